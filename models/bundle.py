"""Model bundles: one self-describing folder, loadable with nothing else.

    manifest.json  what the model is and how it serves (models.manifest.Manifest): format, name,
                   creation time, content hash, model and training config, settings space,
                   resolution, channels, settings spacing, training metrics, confidence model (or
                   null), the route's tube and the detail-transfer choice
    weights.pt     state dict of encoder, decoder and heads (torch.load(..., weights_only=True))
    bank.npz       codes, params and 8-bit images of every training sample (the bank), and the same
                   for the held-out share, which is never in the bank

The content hash is a SHA-256 over the weights' tensors, the arrays and the manifest's fields
other than metrics and creation time: it names what the model computes, not the file encoding
or how long training took.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, replace
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import torch

from .manifest import FORMAT, BundleError, Manifest  # the bundle's error, also raised by the manifest's checks
from .nets import Autoencoder
from .params import ParamSpace

MANIFEST, WEIGHTS, BANK = "manifest.json", "weights.pt", "bank.npz"
BANK_ARRAYS = ("codes", "params", "images", "holdout_codes", "holdout_params", "holdout_images")
# the captures at their own size (long side capped at training), for frames at full size; optional
FULL_ARRAYS = ("full_images", "holdout_full_images")


@dataclass
class Bundle:
    """A loaded bundle. Image arrays of a bundle read from disk stay on disk until asked for
    (`images()` reads them each time and keeps nothing), so a served model with a large bank
    holds its codes, not its pixels."""
    manifest: Manifest
    model: Autoencoder
    arrays: dict[str, np.ndarray]
    path: Path | None = None  # the folder it was loaded from, where image arrays not in `arrays` live
    stored: tuple[str, ...] = ()  # the arrays in its bank.npz (of a bundle on disk)

    @property
    def has_full(self) -> bool:
        """Whether the captures are kept at their own size (larger than the model's)."""
        return all(k in self.arrays or k in self.stored for k in FULL_ARRAYS)

    @property
    def space(self) -> ParamSpace:
        return self.manifest.space

    @property
    def codes(self) -> np.ndarray:
        return self.arrays["codes"]

    @property
    def params(self) -> np.ndarray:
        return self.arrays["params"]

    @property
    def scale(self) -> np.ndarray:
        return np.asarray(self.manifest.scale, dtype=np.float64)

    def images(self, which: str = "images") -> np.ndarray:
        """Bank (or held-out) images as float32 (N, H, W, C) in [0, 1]."""
        return self.pixels(which).astype(np.float32) / 255.0

    def pixels(self, which: str = "images") -> np.ndarray:
        """Bank (or held-out) images as stored: uint8 (N, H, W, C); read from disk if not in memory."""
        if which not in BANK_ARRAYS + FULL_ARRAYS or "images" not in which:
            raise KeyError(f"{which}: not an image array of a bundle")
        if which in self.arrays:
            return self.arrays[which]
        if self.path is None:
            raise KeyError(f"{which}: not in this in-memory bundle")
        with np.load(self.path / BANK, allow_pickle=False) as z:
            return z[which]

    def mapped_pixels(self, which: str = "images") -> np.ndarray:
        """Like `pixels`, but for a bundle on disk a read-only memory map of the stored array, so
        reading a few images (detail transfer's neighbours) touches only their pages; the whole
        array where it cannot be mapped (in memory, or a compressed member)."""
        if which in self.arrays or self.path is None:
            return self.pixels(which)
        mapped = _map_npz_member(self.path / BANK, which)
        return self.pixels(which) if mapped is None else mapped


def full_capture_size(path: str | Path) -> tuple[int, int] | None:
    """(width, height) of the captures a bundle folder keeps at full size; None when it keeps none."""
    try:
        mapped = _map_npz_member(Path(path) / BANK, FULL_ARRAYS[0])
    except KeyError:
        return None
    if mapped is None:
        with np.load(Path(path) / BANK, allow_pickle=False) as z:
            mapped = z[FULL_ARRAYS[0]]
    return int(mapped.shape[2]), int(mapped.shape[1])


def _map_npz_member(path: Path, name: str) -> np.ndarray | None:
    """Memory map of an uncompressed .npz member (np.savez stores members uncompressed), or None."""
    import zipfile

    with zipfile.ZipFile(path) as zf:
        try:
            info = zf.getinfo(name + ".npy")
        except KeyError:
            raise KeyError(f"{name}: not in {path}") from None
        if info.compress_type != zipfile.ZIP_STORED:
            return None
    with open(path, "rb") as fh:
        fh.seek(info.header_offset)
        local = fh.read(30)  # the local file header: its name and extra field lengths sit at 26..30
        name_len, extra_len = int.from_bytes(local[26:28], "little"), int.from_bytes(local[28:30], "little")
        fh.seek(info.header_offset + 30 + name_len + extra_len)
        version = np.lib.format.read_magic(fh)
        read_header = {(1, 0): np.lib.format.read_array_header_1_0,
                       (2, 0): np.lib.format.read_array_header_2_0}.get(version)
        if read_header is None:
            return None
        shape, fortran, dtype = read_header(fh)
        offset = fh.tell()
    if fortran or dtype.hasobject:
        return None
    return np.memmap(path, dtype=dtype, mode="r", offset=offset, shape=shape)


def _to_uint8(images: np.ndarray) -> np.ndarray:
    if images.dtype == np.uint8:
        return images
    return np.round(np.clip(images, 0.0, 1.0) * 255.0).astype(np.uint8)


def content_hash(state: dict[str, torch.Tensor], arrays: dict[str, np.ndarray], manifest: dict) -> str:
    h = hashlib.sha256()
    for key in sorted(state):
        h.update(key.encode())
        h.update(state[key].detach().cpu().contiguous().numpy().tobytes())
    for key in sorted(arrays):
        a = np.ascontiguousarray(arrays[key])
        h.update(f"{key}:{a.dtype.str}:{a.shape}".encode())
        h.update(a.tobytes())
    rest = {k: v for k, v in manifest.items() if k not in ("hash", "created", "metrics")}
    h.update(json.dumps(rest, sort_keys=True).encode())
    return h.hexdigest()


def save_bundle(out: str | Path, manifest: Manifest, model: Autoencoder, arrays: dict[str, np.ndarray]
                ) -> Manifest:
    """Write a bundle folder (created if needed) and return its manifest as written: in the
    current format, with the creation time, the bank sizes and the content hash set here. Images
    are float in [0, 1]."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    missing = [k for k in BANK_ARRAYS if k not in arrays]
    if missing:
        raise BundleError(f"bundle arrays missing: {missing}")
    stored = {k: (_to_uint8(v) if "images" in k else np.asarray(v, dtype=np.float64)) for k, v in arrays.items()}
    state = {k: v.detach().clone() for k, v in model.state_dict().items()}
    manifest = replace(manifest, format=FORMAT, created=datetime.now(timezone.utc).isoformat(timespec="seconds"),
                       bank_size=int(len(stored["codes"])), holdout_size=int(len(stored["holdout_codes"])), hash="")
    manifest = replace(manifest, hash=content_hash(state, stored, manifest.to_dict()))
    torch.save(state, out / WEIGHTS)
    np.savez(out / BANK, **stored)
    (out / MANIFEST).write_text(json.dumps(manifest.to_dict(), indent=1))
    return manifest


def read_manifest(path: str | Path) -> Manifest:
    """The manifest of the bundle folder `path`, parsed (no weights read)."""
    path = Path(path)
    try:
        text = json.loads((path / MANIFEST).read_text())
    except FileNotFoundError:
        raise BundleError(f"{path}: no {MANIFEST}; not a model bundle") from None
    except json.JSONDecodeError as exc:
        raise BundleError(f"{path / MANIFEST}: not valid JSON ({exc})") from None
    try:
        return Manifest.from_dict(text)
    except BundleError as exc:
        raise BundleError(f"{path / MANIFEST}: {exc}") from None


def load_bundle(path: str | Path) -> Bundle:
    path = Path(path)
    manifest = read_manifest(path)
    for f in (WEIGHTS, BANK):
        if not (path / f).is_file():
            raise BundleError(f"{path}: {f} is missing")
    model = Autoencoder(manifest.model_config)
    model.load_state_dict(torch.load(path / WEIGHTS, weights_only=True, map_location="cpu"))
    model.eval()
    with np.load(path / BANK, allow_pickle=False) as z:
        missing = [k for k in BANK_ARRAYS if k not in z.files]
        if missing:
            raise BundleError(f"{path / BANK}: arrays missing: {missing}")
        arrays = {k: z[k] for k in z.files if "images" not in k}  # pixels stay on disk until asked for
        stored = tuple(z.files)
    return Bundle(manifest, model, arrays, path=path, stored=stored)
