"""Tests for service.registry: publish, lookup, delete, crash safety, names, concurrency."""
from __future__ import annotations

import hashlib
import json
import os
import sqlite3
import threading
import time
from datetime import datetime, timedelta
from pathlib import Path

import pytest

from geotween.service import registry as reg_mod
from geotween.service.registry import (
    DEFAULT_ROOT,
    InvalidName,
    ModelNotFound,
    ModelVersion,
    Registry,
    RegistryError,
    VersionNotFound,
    resolve_root,
)


def make_build(metrics: dict, *, weights: bytes = b"\x00\x01" * 64, pause_s: float = 0.0,
               fail: bool = False, manifest: dict | None = None):
    """A build callback writing weights.bin, then (unless `manifest` says otherwise) manifest.json."""
    def build(folder: Path) -> None:
        with open(folder / "weights.bin", "wb") as fh:  # written in two halves to widen the window
            fh.write(weights[: len(weights) // 2])
            fh.flush()
            time.sleep(pause_s)
            fh.write(weights[len(weights) // 2:])
        (folder / "arrays").mkdir()
        (folder / "arrays" / "bank.bin").write_bytes(b"bank")
        if fail:
            raise RuntimeError("training blew up")
        body = manifest if manifest is not None else {
            "hash": hashlib.sha256(weights).hexdigest(), "metrics": metrics}
        (folder / "manifest.json").write_text(json.dumps(body))
    return build


def tree(path: Path) -> set[str]:
    return {p.relative_to(path).as_posix() for p in path.rglob("*")}


def rows(root: Path) -> list[tuple]:
    # Read the index with a separate plain connection, not through the code under test.
    with sqlite3.connect(root / "index.sqlite") as con:
        return con.execute("SELECT name, version, status FROM versions ORDER BY name, version").fetchall()


@pytest.fixture
def reg(tmp_path: Path) -> Registry:
    return Registry.open(tmp_path / "root")


def test_publish_list_get_and_metrics_round_trip(reg: Registry):
    m1 = {"ece": 0.031, "auroc": 0.912, "per_param": {"lamp_azimuth": 1.5}, "n": 40}
    m2 = {"ece": 0.02, "auroc": 0.95, "notes": ["held-out 20%"], "nan_free": True}
    w2 = b"second model weights"
    v1 = reg.publish("relief-tile", make_build(m1))
    v2 = reg.publish("relief-tile", make_build(m2, weights=w2))
    other = reg.publish("lines.32", make_build({"ece": 0.1}))
    assert (v1.version, v2.version, other.version) == (1, 2, 1)

    assert [v.version for v in reg.versions("relief-tile")] == [1, 2]
    assert reg.get("relief-tile") == v2
    assert reg.get("relief-tile", 1) == v1
    assert reg.get("relief-tile", 1).metrics == m1
    assert reg.get("relief-tile").metrics == m2
    # The hash recorded is the manifest's (the sha256 our build wrote), not something made up.
    assert reg.get("relief-tile").hash == hashlib.sha256(w2).hexdigest()
    assert (reg.get("relief-tile").path / "weights.bin").read_bytes() == w2
    assert v2.path == reg.root / "models" / "relief-tile" / "2"

    summaries = {s.name: s for s in reg.list_models()}
    assert sorted(summaries) == ["lines.32", "relief-tile"]
    assert (summaries["relief-tile"].latest_version, summaries["relief-tile"].n_versions) == (2, 2)
    assert summaries["relief-tile"].latest_created == v2.created
    assert summaries["relief-tile"].to_dict()["n_versions"] == 2

    d = v2.to_dict()
    assert d["path"] == str(v2.path) and d["metrics"] == m2
    json.dumps(d)  # the wire layer needs it JSON-serialisable
    # ISO-8601 UTC, parsed by the standard library (3.11 accepts the trailing Z).
    created = datetime.fromisoformat(v2.created)
    assert created.utcoffset() == timedelta(0)
    assert datetime.fromisoformat(v1.created) <= created


def test_index_format_on_disk(reg: Registry):
    reg.publish("m", make_build({"ece": 0.1}))
    with sqlite3.connect(reg.index) as con:
        # WAL lets readers run beside the one writer (SQLite documentation, "Write-Ahead Logging").
        assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        cols = {r[1]: r[2] for r in con.execute("PRAGMA table_info(versions)")}
        pk = [r[1] for r in sorted(con.execute("PRAGMA table_info(versions)"), key=lambda r: r[5]) if r[5]]
        row = con.execute("SELECT metrics, status, path FROM versions").fetchone()
    assert cols == {"name": "TEXT", "version": "INTEGER", "created": "TEXT", "hash": "TEXT",
                    "metrics": "TEXT", "status": "TEXT", "path": "TEXT"}
    assert pk == ["name", "version"]
    assert json.loads(row[0]) == {"ece": 0.1} and row[1] == "ready"
    assert (reg.root / row[2] / "manifest.json").is_file()


def test_delete_marks_row_removes_folder_and_never_reuses_numbers(reg: Registry):
    for _ in range(2):
        reg.publish("m", make_build({"ece": 0.1}))
    folder2 = reg.get("m", 2).path
    g = reg.generation()
    reg.delete("m", 2)
    assert reg.generation() > g
    assert not folder2.exists()
    assert [v.version for v in reg.versions("m")] == [1]
    assert reg.get("m").version == 1
    with pytest.raises(VersionNotFound, match="version 2 of model 'm' was deleted"):
        reg.get("m", 2)
    with pytest.raises(VersionNotFound):
        reg.delete("m", 2)
    assert reg.publish("m", make_build({"ece": 0.2})).version == 3
    reg.delete("m", 3)  # deleting the newest must not free its number either
    assert reg.publish("m", make_build({"ece": 0.3})).version == 4
    assert rows(reg.root) == [("m", 1, "ready"), ("m", 2, "deleted"), ("m", 3, "deleted"),
                              ("m", 4, "ready")]
    assert reg.list_models()[0].n_versions == 2


def test_lookup_errors_are_lookup_errors_with_clear_messages(reg: Registry):
    reg.publish("m", make_build({}))
    with pytest.raises(ModelNotFound, match="no model named 'nope'"):
        reg.get("nope")
    with pytest.raises(LookupError):
        reg.versions("nope")
    with pytest.raises(VersionNotFound, match=r"version 7 of model 'm' does not exist; ready versions: 1"):
        reg.get("m", 7)
    reg.delete("m", 1)
    with pytest.raises(ModelNotFound):  # every version deleted: the model is gone
        reg.get("m")
    assert reg.list_models() == []


def test_build_that_raises_leaves_registry_unchanged(reg: Registry):
    v1 = reg.publish("m", make_build({"ece": 0.1}))
    before_models, g = tree(reg.root / "models"), reg.generation()
    with pytest.raises(RuntimeError, match="training blew up"):
        reg.publish("m", make_build({"ece": 0.2}, fail=True))
    assert reg.versions("m") == [v1]
    assert (reg.get("m").path / "manifest.json").is_file()
    assert (reg.get("m").path / "weights.bin").read_bytes() == b"\x00\x01" * 64
    assert tree(reg.root / "models") == before_models
    assert list((reg.root / "staging").iterdir()) == []
    assert rows(reg.root) == [("m", 1, "ready")] and reg.generation() == g


def test_rename_failure_leaves_registry_unchanged(reg: Registry, monkeypatch):
    v1 = reg.publish("m", make_build({"ece": 0.1}))
    before = tree(reg.root / "models")

    def broken_rename(src, dst):
        raise OSError("disk vanished")
    monkeypatch.setattr(reg_mod.os, "rename", broken_rename)
    with pytest.raises(OSError, match="disk vanished"):
        reg.publish("m", make_build({"ece": 0.2}))
    monkeypatch.undo()
    assert reg.versions("m") == [v1]
    assert tree(reg.root / "models") == before
    assert list((reg.root / "staging").iterdir()) == []
    assert rows(reg.root) == [("m", 1, "ready")]
    assert reg.publish("m", make_build({"ece": 0.3})).version == 2  # and it still works


def test_insert_failure_after_rename_moves_folder_out(reg: Registry, monkeypatch):
    v1 = reg.publish("m", make_build({"ece": 0.1}))
    before, g = tree(reg.root / "models"), reg.generation()
    seen = []

    def broken_insert(con, entry, rel_path):
        seen.append((reg.root / rel_path / "manifest.json").is_file())  # the rename did happen
        raise sqlite3.OperationalError("database or disk is full")
    monkeypatch.setattr(reg_mod, "_insert_row", broken_insert)
    with pytest.raises(RegistryError, match="disk is full"):
        reg.publish("m", make_build({"ece": 0.2}))
    assert seen == [True]
    assert reg.versions("m") == [v1] and reg.generation() == g
    assert tree(reg.root / "models") == before  # no orphan folder models/m/2
    assert list((reg.root / "staging").iterdir()) == []


@pytest.mark.parametrize("manifest, why", [
    (None, "no manifest.json"),
    ({"metrics": {}}, "lacks the key 'hash'"),
    ({"hash": "abc"}, "lacks the key 'metrics'"),
    ({"hash": "abc", "metrics": [0.1]}, "'metrics' must be a non-empty JSON object"),
    ({"hash": "", "metrics": {}}, "'hash' must be a non-empty string"),
    ("not json {", "not readable JSON"),
])
def test_bad_manifest_is_refused(reg: Registry, manifest, why):
    def build(folder: Path) -> None:
        (folder / "weights.bin").write_bytes(b"w")
        if manifest is not None:
            text = manifest if isinstance(manifest, str) else json.dumps(manifest)
            (folder / "manifest.json").write_text(text)
    with pytest.raises(RegistryError, match=why):
        reg.publish("m", build)
    assert reg.list_models() == []
    assert tree(reg.root / "models") == set()
    assert list((reg.root / "staging").iterdir()) == []


BAD_NAMES = ["../x", "a/b", "A", "", "x" * 65, "a\\b", ".hidden", "na\x00me", "a..b", "tile\n",
             "café", "-lead", "/abs", None, 3]


@pytest.mark.parametrize("name", BAD_NAMES)
def test_invalid_names_are_refused_and_touch_nothing(tmp_path: Path, name):
    reg = Registry.open(tmp_path / "root")
    before = tree(tmp_path)
    called = []
    with pytest.raises(InvalidName, match="name must match") as info:
        reg.publish(name, lambda folder: called.append(folder))
    assert repr(name) in str(info.value)  # the message names the bad value
    assert isinstance(info.value, ValueError)
    for call in (reg.get, reg.versions, lambda n: reg.delete(n, 1)):
        with pytest.raises(InvalidName):
            call(name)
    assert called == [] and tree(tmp_path) == before


@pytest.mark.parametrize("name", ["a", "0", "relief-tile_v1.2", "x" * 64])
def test_names_at_the_edges_of_the_rule_are_accepted(reg: Registry, name):
    assert reg.publish(name, make_build({})).name == name


@pytest.mark.parametrize("version", [0, -1, True, "2", 1.0])
def test_bad_version_numbers_are_refused(reg: Registry, version):
    reg.publish("m", make_build({}))
    with pytest.raises(InvalidName, match="positive integer"):
        reg.get("m", version)
    with pytest.raises(ValueError):
        reg.delete("m", version)


def test_readers_never_see_incomplete_bundles_during_publishes(reg: Registry):
    weights = bytes(range(256)) * 8
    reg.publish("m", make_build({"i": 0}, weights=weights))
    stop, errors, reads = threading.Event(), [], [0]
    other = Registry(reg.root)  # a second handle on the same folder, as another process would have

    def reader(handle: Registry) -> None:
        while not stop.is_set():
            try:
                for v in handle.versions("m") + [handle.get("m")]:
                    if not (v.path / "manifest.json").is_file():
                        errors.append(f"v{v.version} listed without manifest.json")
                    elif (v.path / "weights.bin").stat().st_size != len(weights):
                        errors.append(f"v{v.version} listed with truncated weights")
                reads[0] += 1
            except Exception as exc:  # any error is a failure of the test
                errors.append(repr(exc))

    threads = [threading.Thread(target=reader, args=(h,)) for h in (reg, reg, other)]
    for t in threads:
        t.start()
    try:
        for i in range(1, 6):
            reg.publish("m", make_build({"i": i}, weights=weights, pause_s=0.03))
    finally:
        stop.set()
        for t in threads:
            t.join(timeout=10)
    assert errors == []
    assert reads[0] > 5
    assert [v.version for v in other.versions("m")] == [1, 2, 3, 4, 5, 6]
    assert [v.metrics["i"] for v in reg.versions("m")] == [0, 1, 2, 3, 4, 5]


def test_generation_counts_changes_across_handles(reg: Registry):
    other = Registry(reg.root)
    g0 = other.generation()
    reg.publish("m", make_build({}))
    g1 = other.generation()
    reg.versions("m"), reg.get("m"), reg.list_models()  # reads do not change it
    assert g0 < g1 == other.generation()
    reg.delete("m", 1)
    assert other.generation() > g1


def test_resolve_root_precedence(tmp_path: Path, monkeypatch):
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    monkeypatch.setenv("GEOTWEEN_REGISTRY", str(tmp_path / "from-env"))
    assert resolve_root(tmp_path / "explicit") == tmp_path / "explicit"
    assert resolve_root(str(tmp_path / "explicit")) == tmp_path / "explicit"
    assert resolve_root(None) == tmp_path / "from-env"
    monkeypatch.setenv("GEOTWEEN_REGISTRY", "~/reg")
    assert resolve_root(None) == tmp_path / "home" / "reg"
    monkeypatch.delenv("GEOTWEEN_REGISTRY")
    # ~/.local/share is the XDG Base Directory default data home (freedesktop.org spec).
    assert resolve_root(None) == tmp_path / "home" / ".local" / "share" / "geotween" / "registry"
    assert DEFAULT_ROOT.expanduser() == resolve_root(None)
    monkeypatch.setenv("GEOTWEEN_REGISTRY", str(tmp_path / "from-env"))
    assert Registry.open(None).root == tmp_path / "from-env"


def test_readable_tracks_the_index(tmp_path: Path):
    fresh = Registry(tmp_path / "fresh")
    assert fresh.readable() is False and not (tmp_path / "fresh").exists()  # the probe creates nothing
    reg = Registry.open(tmp_path / "ok")
    assert reg.readable() is True
    reg.publish("m", make_build({}))
    assert reg.readable() is True

    bad = tmp_path / "bad"
    bad.mkdir()
    (bad / "index.sqlite").write_bytes(b"\x89not a database\xff\x00" * 128)
    assert Registry(bad).readable() is False
    with pytest.raises(RegistryError, match="index"):
        Registry.open(bad)
    with pytest.raises(RegistryError, match="index.sqlite missing"):
        Registry.open(tmp_path / "none", create=False)


def test_open_cleans_stale_staging_and_ignores_orphan_folders(tmp_path: Path):
    reg = Registry.open(tmp_path / "root")
    reg.publish("m", make_build({}))
    stale, fresh = reg.root / "staging" / "m-stale", reg.root / "staging" / "m-fresh"
    for folder in (stale, fresh):
        folder.mkdir()
        (folder / "weights.bin").write_bytes(b"w")
    two_hours_ago = time.time() - 7200
    os.utime(stale, (two_hours_ago, two_hours_ago))
    # A folder with no row, as a crash between rename and insert would leave.
    orphan = reg.root / "models" / "m" / "2"
    orphan.mkdir()
    (orphan / "manifest.json").write_text(json.dumps({"hash": "h", "metrics": {}}))
    (reg.root / "models" / "ghost" / "1").mkdir(parents=True)

    reopened = Registry.open(reg.root)
    assert not stale.exists() and fresh.exists()  # only folders past stale_staging_s go
    assert [v.version for v in reopened.versions("m")] == [1]
    assert [s.name for s in reopened.list_models()] == ["m"]
    with pytest.raises(ModelNotFound):
        reopened.get("ghost")
    assert reopened.publish("m", make_build({})).version == 3  # the orphan is left alone
    assert (orphan / "manifest.json").is_file()


def test_model_version_is_frozen_and_hashable(reg: Registry):
    v = reg.publish("m", make_build({"ece": 0.1}))
    assert isinstance(v, ModelVersion)
    with pytest.raises(AttributeError):
        v.version = 9
    assert len({v, reg.get("m")}) == 1
