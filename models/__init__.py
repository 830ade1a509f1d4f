"""geotween's learning side: scenes, renderer, networks, training, bundles and latent geometry."""
