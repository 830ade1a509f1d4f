"""Global options (--registry, --threads) stand before or after the verb."""
import pytest

from geotween.service.cli import build_parser, main

VERBS = {  # each verb with the arguments it requires
    "demo": [], "render-demo": ["out"], "train": ["scene", "--name", "n"], "between": ["m", "a=1", "a=2", "--out", "o"],
    "eval": ["m", "truth"], "models": [], "serve": [], "worker": [], "fill": ["m", "targets.csv", "--out", "o"],
}


@pytest.mark.parametrize("verb", sorted(VERBS))
def test_global_options_after_the_verb(verb):
    p = build_parser()
    after = p.parse_args([verb, *VERBS[verb], "--registry", "/r", "--threads", "3"])
    before = p.parse_args(["--registry", "/r", "--threads", "3", verb, *VERBS[verb]])
    plain = p.parse_args([verb, *VERBS[verb]])
    assert (after.registry, after.threads) == (before.registry, before.threads) == ("/r", 3)
    assert (plain.registry, plain.threads) == (None, None)


def test_every_verb_is_covered():
    sub = next(a for a in build_parser()._actions if a.dest == "command")
    assert set(sub.choices) == set(VERBS)


def test_registry_after_the_verb_is_the_one_used(tmp_path, capsys, monkeypatch):
    monkeypatch.delenv("GEOTWEEN_REGISTRY", raising=False)
    folder = tmp_path / "reg"
    assert main(["models", "--registry", str(folder)]) == 0
    assert folder.is_dir()  # opened (and created) where the option after the verb said
