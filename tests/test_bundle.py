"""Tests of embed.bundle: write/read/verify encoder bundles; refusal of bad bundles; no unpickling."""

import json
import pathlib
import pickle
import struct

import numpy as np
import pytest
import torch
from safetensors import safe_open
from safetensors.torch import save_file

import embed
from embed.bundle import (
    CARD_KEY, FORMAT_VERSION, load_encoder, read_bundle, weights_sha256, write_bundle,
)
from embed.config import Config, to_dict
from embed.dense import Encoder
from embed.errors import BundleError
from embed.model import build

P, CHANNELS, DIM, C = 5, (4, 6), 3, 2


def encoder_module(seed: int = 0):
    return build(C, P, CHANNELS, DIM, seed).encoder


def make_card() -> dict:
    return {
        "contrasts": ["T1w", "FLAIR"],
        "normalisation": {"method": "zscore", "within": "mask"},
        "patch": {"size": P, "plane": "coronal", "axis": 1, "padding": "zeros"},
        "architecture": {"kind": "valid-conv-encoder", "in_channels": C, "patch_size": P,
                         "channels": list(CHANNELS), "dim": DIM},
        "config": to_dict(Config()),
        "twinpatch_version": embed.__version__,
    }


@pytest.fixture
def bundle(tmp_path):
    module = encoder_module()
    path = write_bundle(tmp_path / "out" / "encoder.safetensors", module.state_dict(), make_card())
    return path, module


def expect_error(path, match):
    with pytest.raises(BundleError, match=match) as exc:
        load_encoder(path)
    assert "\n" not in str(exc.value)
    return exc


# --------------------------------------------------------------------------------------------
# round trip


def test_write_read_roundtrip(bundle):
    path, module = bundle
    assert path.is_file()
    assert [p.name for p in path.parent.iterdir()] == ["encoder.safetensors"]  # no .partial left
    tensors, card = read_bundle(path)
    state = module.state_dict()
    assert tensors.keys() == state.keys()
    for k in state:
        assert tensors[k].dtype == state[k].dtype and torch.equal(tensors[k], state[k])
    for k, v in make_card().items():
        assert card[k] == v
    assert card["format_version"] == FORMAT_VERSION
    assert card["weights_sha256"] == weights_sha256(state)
    assert len(card["weights_sha256"]) == 64 and int(card["weights_sha256"], 16) >= 0


def test_load_encoder_matches_the_original_module(bundle):
    path, module = bundle
    enc = load_encoder(path)
    assert isinstance(enc, Encoder)
    assert (enc.patch_size, enc.in_channels, enc.dim, enc.axis) == (P, C, DIM, 1)
    assert enc.channel_names == ("T1w", "FLAIR")
    assert enc.card["patch"]["plane"] == "coronal"
    x = torch.from_numpy(np.random.default_rng(0).normal(size=(16, C, P, P)).astype(np.float32))
    with torch.no_grad():
        want = module.embed(x).numpy()
    np.testing.assert_array_equal(enc.embed_patches(x), want)
    # the package-level entry point is the same loader
    np.testing.assert_array_equal(embed.load_encoder(path).embed_patches(x), want)


def test_bundle_is_a_plain_safetensors_file(bundle):
    path, module = bundle
    # Source: safetensors (safe_open is the library's own reader).
    with safe_open(str(path), framework="pt") as f:
        assert set(f.keys()) == set(module.state_dict())
        meta = f.metadata()
        for k, v in module.state_dict().items():
            assert torch.equal(f.get_tensor(k), v)
    card = json.loads(meta[CARD_KEY])
    assert card["architecture"] == make_card()["architecture"]
    # Source: the safetensors format description (README of the safetensors project; from memory):
    # 8 bytes little-endian header size, then a JSON header with one entry per tensor and the
    # string-to-string "__metadata__" map.
    raw = path.read_bytes()
    (n,) = struct.unpack("<Q", raw[:8])
    header = json.loads(raw[8:8 + n])
    assert header["__metadata__"][CARD_KEY] == meta[CARD_KEY]
    assert set(header) - {"__metadata__"} == set(module.state_dict())
    with safe_open(str(path), framework="numpy") as f:  # readable without torch too
        assert f.get_tensor("layers.0.weight").shape == (CHANNELS[0], C, 3, 3)


def test_weights_sha256_properties():
    state = encoder_module().state_dict()
    h = weights_sha256(state)
    assert weights_sha256(dict(reversed(list(state.items())))) == h  # name order, not insertion order
    changed = {k: v.clone() for k, v in state.items()}
    changed["layers.0.weight"][0, 0, 0, 0] += 1e-6
    assert weights_sha256(changed) != h
    renamed = {("x" + k if k == "layers.0.bias" else k): v for k, v in state.items()}
    assert weights_sha256(renamed) != h
    reshaped = dict(state, **{"layers.0.bias": state["layers.0.bias"].reshape(1, -1)})
    assert weights_sha256(reshaped) != h  # same bytes, other shape
    assert weights_sha256(encoder_module(seed=1).state_dict()) != h


def test_bundle_with_scalar_empty_and_bf16_tensors(tmp_path):
    # 0-dim, empty and bfloat16 tensors are all valid safetensors content and must hash and round-trip.
    tensors = {"scale": torch.tensor(2.5), "empty": torch.zeros(0, 3), "half": torch.ones(3, dtype=torch.bfloat16)}
    path = write_bundle(tmp_path / "s.safetensors", tensors, {"architecture": {}})
    back, card = read_bundle(path)
    for k, v in tensors.items():
        assert back[k].dtype == v.dtype and back[k].shape == v.shape and torch.equal(back[k], v)
    assert card["weights_sha256"] == weights_sha256(tensors)
    assert weights_sha256({"scale": torch.tensor(2.5)}) != weights_sha256({"scale": torch.tensor([2.5])})


# --------------------------------------------------------------------------------------------
# bad bundles


def test_missing_file(tmp_path):
    expect_error(tmp_path / "nope.safetensors",
                 r"encoder bundle .*nope\.safetensors not found; pass the \.safetensors file written by "
                 r"`twinpatch export`")


@pytest.mark.parametrize("content", [b"", b"not a safetensors file at all", b"\xff" * 64,
                                     struct.pack("<Q", 10**6) + b"{}"])
def test_garbage_bytes(tmp_path, content):
    path = tmp_path / "bad.safetensors"
    path.write_bytes(content)
    expect_error(path, r"bad\.safetensors: not a readable safetensors file \(\w+: .*\); re-export it")


def test_truncated_file(tmp_path, bundle):
    path, _ = bundle
    cut = tmp_path / "cut.safetensors"
    cut.write_bytes(path.read_bytes()[:-40])
    expect_error(cut, r"cut\.safetensors: not a readable safetensors file")


def test_safetensors_without_card(tmp_path):
    path = tmp_path / "plain.safetensors"
    save_file(encoder_module().state_dict(), str(path))  # source: safetensors.torch.save_file
    expect_error(path, r"plain\.safetensors: safetensors file without a twinpatch card "
                       r"\(metadata key 'twinpatch\.card'\); it was not written by `twinpatch export`")
    save_file(encoder_module().state_dict(), str(path), metadata={"other": "x"})
    expect_error(path, r"without a twinpatch card")


def test_card_not_json(tmp_path):
    path = tmp_path / "nj.safetensors"
    save_file(encoder_module().state_dict(), str(path), metadata={CARD_KEY: "{not json"})
    expect_error(path, r"nj\.safetensors: its card is not valid JSON \(.*\); re-export the bundle")


def rewrite(src: pathlib.Path, dst: pathlib.Path, tensors=None, card=None):
    """Rewrite a bundle with other tensors and/or another card, keeping the rest as it was."""
    old_tensors, old_card = read_bundle(src, verify=False)
    tensors = old_tensors if tensors is None else tensors
    card = old_card if card is None else card
    save_file(tensors, str(dst), metadata={CARD_KEY: json.dumps(card)})
    return dst


def test_tampered_tensor_fails_the_checksum(tmp_path, bundle):
    path, _ = bundle
    tensors, card = read_bundle(path)
    tensors = {k: v.clone() for k, v in tensors.items()}
    tensors["layers.2.weight"][1, 0, 0, 0] += 0.5
    bad = rewrite(path, tmp_path / "tampered.safetensors", tensors=tensors)  # old card, old checksum
    exc = expect_error(bad, r"tampered\.safetensors: weights checksum mismatch \(card [0-9a-f]{12}\.\.\., "
                            r"file [0-9a-f]{12}\.\.\.\): the file was altered or damaged; re-export it")
    assert card["weights_sha256"][:12] in str(exc.value)
    # without verification the altered tensors are read as they are
    back, _ = read_bundle(bad, verify=False)
    assert torch.equal(back["layers.2.weight"], tensors["layers.2.weight"])


def test_missing_checksum_fails(tmp_path, bundle):
    path, _ = bundle
    _, card = read_bundle(path)
    del card["weights_sha256"]
    expect_error(rewrite(path, tmp_path / "nosum.safetensors", card=card), r"weights checksum mismatch \(card None")


@pytest.mark.parametrize("version", [2, 0, "1", None])
def test_wrong_format_version(tmp_path, bundle, version):
    path, _ = bundle
    _, card = read_bundle(path)
    card["format_version"] = version
    bad = rewrite(path, tmp_path / "v.safetensors", card=card)
    expect_error(bad, rf"v\.safetensors: bundle format version {version!r} is not supported by this twinpatch "
                      rf"\(reads version {FORMAT_VERSION}\); upgrade twinpatch or re-export the bundle")


def test_wrong_format_name(tmp_path, bundle):
    path, _ = bundle
    _, card = read_bundle(path)
    card["format"] = "some-other-model"
    expect_error(rewrite(path, tmp_path / "f.safetensors", card=card),
                 r"f\.safetensors: card format is 'some-other-model', expected 'twinpatch-encoder'")


@pytest.mark.parametrize("change, kind", [
    (lambda a: a.update(dim=DIM + 1), "RuntimeError"),             # tensors have another embedding size
    (lambda a: a.update(channels=[4, 7]), "RuntimeError"),         # another hidden width
    (lambda a: a.update(channels=[4]), "RuntimeError"),            # fewer layers: unexpected keys
    (lambda a: a.update(in_channels=3), "RuntimeError"),
    (lambda a: a.update(patch_size=7), "RuntimeError"),            # another final kernel
    (lambda a: a.update(patch_size=3), "ConfigError"),             # no valid architecture at all
    (lambda a: a.pop("dim"), "KeyError"),
    (lambda a: a.update(channels=None), "TypeError"),
])
def test_card_architecture_disagrees_with_tensors(tmp_path, change, kind):
    card = make_card()
    change(card["architecture"])
    # write_bundle computes a correct checksum, so only the architecture check can catch this
    path = write_bundle(tmp_path / "arch.safetensors", encoder_module().state_dict(), card)
    read_bundle(path)  # the file itself is fine
    expect_error(path, rf"arch\.safetensors: card architecture and tensors disagree \({kind}: .*\); "
                       r"re-export the bundle")


def test_even_patch_size_is_refused_at_load(tmp_path):
    # Config demands an odd patch.size; a bundle can still carry an even one (hand-made or from
    # another tool), and a p x p patch centred on a voxel only exists for odd p.
    card = make_card()
    card["architecture"]["patch_size"] = 4
    card["patch"]["size"] = 4
    # Tensors of an odd (5-voxel) encoder under a card claiming an even patch: refused at load.
    path = write_bundle(tmp_path / "even.safetensors", build(C, 5, (4,), DIM, seed=0).encoder.state_dict(),
                        dict(card, architecture=dict(card["architecture"], channels=[4])))
    with pytest.raises(BundleError, match=r"even\.safetensors: .*patch"):
        load_encoder(path)


def test_extra_tensor_is_refused(tmp_path):
    tensors = dict(encoder_module().state_dict(), extra=torch.zeros(2))
    path = write_bundle(tmp_path / "x.safetensors", tensors, make_card())
    expect_error(path, r"card architecture and tensors disagree \(RuntimeError: .*\)")


# --------------------------------------------------------------------------------------------
# nothing is unpickled


def test_bundle_source_never_mentions_pickle():
    import embed.bundle

    text = pathlib.Path(embed.bundle.__file__).read_text(encoding="utf-8")
    assert "pickle" not in text.lower()


def test_loading_never_calls_torch_load_or_pickle(bundle, monkeypatch):
    path, module = bundle

    def forbidden(*args, **kwargs):
        raise AssertionError("unpickling during bundle loading")

    monkeypatch.setattr(torch, "load", forbidden)
    monkeypatch.setattr(pickle, "load", forbidden)
    monkeypatch.setattr(pickle, "loads", forbidden)
    enc = load_encoder(path)
    x = torch.ones(2, C, P, P)
    with torch.no_grad():
        np.testing.assert_array_equal(enc.embed_patches(x), module.embed(x).numpy())


# --------------------------------------------------------------------------------------------
# portable bundles: ONNX, inspect


def test_onnx_export_matches_torch_on_patches_and_a_whole_slice(bundle, tmp_path):
    import onnx
    import onnxruntime as ort

    from embed.bundle import export_onnx

    path, module = bundle
    enc = load_encoder(path)
    out = export_onnx(enc, tmp_path / "enc.onnx")
    model = onnx.load(str(out))
    onnx.checker.check_model(model)  # the ONNX package's own validity check
    meta = {p.key: p.value for p in model.metadata_props}
    assert json.loads(meta[CARD_KEY])["weights_sha256"] == enc.card["weights_sha256"]
    session = ort.InferenceSession(str(out), providers=["CPUExecutionProvider"])
    rng = np.random.default_rng(9)
    patches = rng.normal(size=(17, C, P, P)).astype(np.float32)
    z = session.run(None, {"x": patches})[0]
    assert z.shape == (17, DIM, 1, 1)
    assert np.abs(z[:, :, 0, 0] - enc.embed_patches(patches)).max() <= 1e-4
    # A whole zero-padded slice gives the dense map of that slice, as embed_volume does.
    vol = rng.normal(size=(C, 12, 9, 10)).astype(np.float32)
    h = P // 2
    dense = enc.embed_volume(vol)  # card axis 1: slices are vol[:, :, y, :]
    sl = np.pad(vol[:, :, 4, :], ((0, 0), (h, h), (h, h)))[None]
    y = session.run(None, {"x": sl})[0][0]
    assert np.abs(y - dense[:, :, 4, :]).max() <= 1e-4


def test_describe_and_verify(bundle, tmp_path):
    from embed.bundle import describe, verify

    path, _ = bundle
    card, ok = verify(path)
    text = describe(card, ok)
    assert ok and "checksum        OK" in text and "T1w, FLAIR" in text and "coronal plane" in text
    data = bytearray(path.read_bytes())
    data[-1] ^= 0x01
    bad = tmp_path / "bad.safetensors"
    bad.write_bytes(bytes(data))
    card, ok = verify(bad)
    assert not ok and "MISMATCH" in describe(card, ok)
