"""serve/core/bundle.py: a damaged, incomplete or future bundle is refused with a named error,
and nothing is loaded half-way.

Reference for the digests: hashlib.sha256 of the file bytes (FIPS 180-4), the
same digest ``sha256sum`` prints.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import pytest

from demur.serve.core.bundle import FORMAT_VERSION, load_bundle, sha256_file, write_manifest
from demur.serve.adapters.engine import Engine
from demur.serve.errors import (
    BundleError,
    BundleNotFound,
    ChecksumMismatch,
    ManifestInvalid,
    NotLoaded,
    UnsupportedFormat,
)


def _flip(path: Path, offset: int | None = None) -> None:
    data = bytearray(path.read_bytes())
    data[len(data) // 2 if offset is None else offset] ^= 0x20
    path.write_bytes(bytes(data))


def _raw(path: Path) -> dict:
    return json.loads((path / "manifest.json").read_text())


def _assert_nothing_loaded(path: Path, error: type[BundleError], field: str) -> None:
    with pytest.raises(error) as info:
        load_bundle(path)
    assert info.value.field == field
    assert info.value.message  # says what was found and what was expected


@pytest.mark.parametrize("kind", ["stacked", "sampler"])
def test_a_flipped_byte_in_a_graph_is_refused(tiny_bundle_factory, copy_bundle, kind: str) -> None:
    path = copy_bundle(tiny_bundle_factory(kind=kind))
    _flip(path / f"{kind}.onnx")
    _assert_nothing_loaded(path, ChecksumMismatch, f"graphs.{kind}.sha256")


def test_a_flipped_byte_in_the_manifest_breaks_the_seal(tiny_bundle_factory, copy_bundle) -> None:
    path = copy_bundle(tiny_bundle_factory())
    text = (path / "manifest.json").read_bytes()
    _flip(path / "manifest.json", text.index(b'"threshold"') + 2)  # "threshold" -> "tHreshold"
    with pytest.raises(ChecksumMismatch, match="manifest.sha256 records") as info:
        load_bundle(path)
    assert info.value.field == "manifest.json"


def test_a_missing_graph_file_is_refused(tiny_bundle_factory, copy_bundle) -> None:
    path = copy_bundle(tiny_bundle_factory())
    (path / "means.onnx").unlink()
    with pytest.raises(BundleNotFound, match="means.onnx named in the manifest is missing"):
        load_bundle(path)


@pytest.mark.parametrize("name", ["manifest.json", "manifest.sha256"])
def test_a_missing_manifest_or_seal_is_refused(tiny_bundle_factory, copy_bundle, name: str) -> None:
    path = copy_bundle(tiny_bundle_factory())
    (path / name).unlink()
    _assert_nothing_loaded(path, BundleNotFound, name)


def test_a_missing_directory_is_refused(tmp_path: Path) -> None:
    _assert_nothing_loaded(tmp_path / "nowhere", BundleNotFound, "bundle")


def test_a_future_format_version_is_refused(tiny_bundle_factory, copy_bundle) -> None:
    """A correctly sealed manifest from a newer demur: refused, naming format_version."""
    path = copy_bundle(tiny_bundle_factory())
    raw = _raw(path)
    raw["format_version"] = FORMAT_VERSION + 1
    data = (json.dumps(raw) + "\n").encode()
    (path / "manifest.json").write_bytes(data)
    (path / "manifest.sha256").write_text(hashlib.sha256(data).hexdigest() + "\n")
    with pytest.raises(UnsupportedFormat, match=f"format_version {FORMAT_VERSION + 1} is not supported"):
        load_bundle(path)


def test_a_graph_path_outside_the_bundle_is_refused(tiny_bundle_factory, copy_bundle) -> None:
    path = copy_bundle(tiny_bundle_factory())
    raw = _raw(path)
    raw["graphs"]["stacked"]["file"] = "../stacked.onnx"
    with pytest.raises(ManifestInvalid, match="plain file name"):
        write_manifest(path, raw)  # the writer validates with the same parser


@pytest.mark.parametrize("target", ["inside", "outside"])
def test_a_graph_file_that_is_a_link_is_refused(tiny_bundle_factory, copy_bundle, tmp_path: Path,
                                                target: str) -> None:
    """A graph file must be a regular file inside the bundle: a symbolic link (even to an
    identical copy, so the digests match) lets the served bytes change, or be read from
    anywhere on the host, while the sealed bundle stays the same."""
    path = copy_bundle(tiny_bundle_factory())
    graph = path / _raw(path)["graphs"]["stacked"]["file"]
    copy = (path / "copy.onnx") if target == "inside" else (tmp_path / "elsewhere.onnx")
    copy.write_bytes(graph.read_bytes())
    graph.unlink()
    graph.symlink_to(copy)
    with pytest.raises(BundleError, match="symbolic link") as err:
        load_bundle(path)
    assert err.value.field == "graphs.stacked.file"
    with pytest.raises(BundleError, match="symbolic link"):
        load_bundle(path, verify=False)


def test_a_manifest_that_is_a_link_is_refused(tiny_bundle_factory, copy_bundle, tmp_path: Path) -> None:
    path = copy_bundle(tiny_bundle_factory())
    real = tmp_path / "manifest-elsewhere.json"
    real.write_bytes((path / "manifest.json").read_bytes())
    (path / "manifest.json").unlink()
    (path / "manifest.json").symlink_to(real)
    with pytest.raises(BundleError, match="symbolic link"):
        load_bundle(path)


def test_a_bundle_directory_reached_through_a_link_still_loads(tiny_bundle_factory, tmp_path: Path) -> None:
    """``bundles/current -> v7`` is how roll-outs name the live bundle: the directory may be a link."""
    link = tmp_path / "current"
    link.symlink_to(tiny_bundle_factory().path, target_is_directory=True)
    assert load_bundle(link).checksum == tiny_bundle_factory().checksum


def test_the_seal_and_digests_are_sha256_of_the_bytes(tiny_bundle_factory) -> None:
    """Reference: hashlib.sha256 over each file's bytes."""
    bundle = tiny_bundle_factory(kind="sampler")
    assert bundle.checksum == hashlib.sha256((bundle.path / "manifest.json").read_bytes()).hexdigest()
    assert (bundle.path / "manifest.sha256").read_text().strip() == bundle.checksum
    for kind, entry in bundle.manifest.graphs.items():
        assert entry.sha256 == hashlib.sha256(bundle.graph_path(kind).read_bytes()).hexdigest()
        assert sha256_file(bundle.graph_path(kind)) == entry.sha256


def test_unknown_keys_survive_a_rewrite(tiny_bundle_factory, copy_bundle) -> None:
    """Compatibility policy (serve/core/bundle.py): unknown sections are written back verbatim."""
    path = copy_bundle(tiny_bundle_factory())
    raw = _raw(path)
    raw["future_section"] = {"kept": [1, 2, 3]}
    raw["extensions"]["later"] = "x"
    write_manifest(path, raw)
    again = load_bundle(path).manifest.raw
    assert again["future_section"] == {"kept": [1, 2, 3]} and again["extensions"]["later"] == "x"


def test_a_refused_bundle_leaves_a_running_engine_untouched(tiny_bundle_factory, copy_bundle) -> None:
    """Nothing half-way: a failed load neither returns a bundle nor swaps what an engine serves."""
    good = tiny_bundle_factory()
    engine = Engine(good).load()
    path = copy_bundle(good)
    _flip(path / "stacked.onnx")
    with pytest.raises(ChecksumMismatch):
        Engine(load_bundle(path))
    assert engine.loaded and engine.checksum == good.checksum
    fresh = Engine(good)
    with pytest.raises(NotLoaded):
        fresh.run([[0.0] * 64])




@pytest.mark.parametrize("name", ["depot\r\nX-Injected: 1", "", "digits\x00", "ziffern-\u00fc", "x" * 201])
def test_model_names_that_cannot_be_a_header_are_refused(tiny_bundle_factory: Any, copy_bundle: Any,
                                                          name: str) -> None:
    """RFC 9110 section 5.5: a field value is visible ASCII and spaces; a CR/LF in the model name
    would inject a header into every response, so the bundle is refused at load, naming the field."""
    path = copy_bundle(tiny_bundle_factory())
    manifest = json.loads((path / "manifest.json").read_text())
    manifest["model"]["name"] = name
    with pytest.raises(ManifestInvalid) as info:  # the writer checks too: such a bundle is never written
        write_manifest(path, manifest)
    assert info.value.field == "model.name"
    (path / "manifest.json").write_text(json.dumps(manifest))  # written by hand, past the writer
    with pytest.raises((ManifestInvalid, ChecksumMismatch)):
        load_bundle(path)


def test_typed_sections_are_parsed_once_at_load(tiny_bundle_factory, copy_bundle) -> None:
    """extensions.training, extensions.training_rows, support and the calibration's stated abstain
    rate come back as typed sections; a bundle without them has None (a model of the user's own)."""
    bundle = tiny_bundle_factory()
    m = bundle.manifest
    assert m.training is None and m.fingerprint is None and m.decision.expected_abstain_rate is None
    path = copy_bundle(bundle)
    raw = _raw(path)
    raw["extensions"] = {"training": {"data": {"source": "digits", "target": "digit", "seed": 3},
                                      "settings": {"epochs": 5}, "arch": {"kind": "mlp"}, "metrics": {}},
                         "training_rows": {"method": "m", "rows": 12, "hashes": ""}}
    raw["decision"]["calibration"] = {"achieved": {"abstain_rate": 0.25}}
    write_manifest(path, raw)
    m = load_bundle(path).manifest
    assert m.training.data.source == "digits" and m.training.data.target == "digit" and m.training.data.seed == 3
    assert m.training.settings == {"epochs": 5} and m.training.arch == {"kind": "mlp"}
    assert m.fingerprint.rows == 12 and m.fingerprint.record["method"] == "m"
    assert m.decision.expected_abstain_rate == 0.25


def test_a_section_of_the_wrong_type_is_refused(tiny_bundle_factory, copy_bundle) -> None:
    path = copy_bundle(tiny_bundle_factory())
    raw = _raw(path)
    raw["extensions"] = {"training_rows": "not an object"}
    with pytest.raises(ManifestInvalid, match="extensions.training_rows' must be an object") as info:
        write_manifest(path, raw)
    assert info.value.field == "extensions.training_rows"
