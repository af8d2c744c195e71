"""The command line: help, the train -> export -> embed path, and bad input (exit 2, one line)."""

from __future__ import annotations

import csv
import shutil
import subprocess
import sys

import nibabel as nib
import numpy as np
import pytest

from embed import load_encoder
from embed.cli import main
from embed.cohort import load_subject

from .conftest import TINY_OVERRIDES

COMMANDS = ["synth", "train", "export", "inspect", "embed"]


@pytest.mark.parametrize("command", COMMANDS)
def test_every_command_has_help_with_an_example(command, capsys):
    with pytest.raises(SystemExit) as exc:
        main([command, "--help"])
    assert exc.value.code == 0
    assert "example:" in capsys.readouterr().out


def _fails(argv, capsys, match):
    """Run the CLI; it must exit 2 with one stderr line matching ``match`` and no traceback."""
    code = main([str(a) for a in argv])
    err = capsys.readouterr().err.strip()
    assert code == 2, err
    assert len(err.splitlines()) == 1, err
    assert "Traceback" not in err
    assert match in err, err
    return err


def _rows(manifest):
    with open(manifest, newline="") as f:
        return list(csv.DictReader(f))


def _write_manifest(path, rows):
    with open(path, "w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    return path


@pytest.fixture()
def cohort_copy(tiny_manifest, tmp_path):
    """A writable copy of the tiny cohort."""
    dst = tmp_path / "cohort"
    shutil.copytree(tiny_manifest.parent, dst)
    return dst / "manifest.csv"


def _rewrite_image(path, transform):
    img = nib.load(path)
    data, affine = transform(img.get_fdata(dtype=np.float32), img.affine.copy())
    nib.save(nib.Nifti1Image(data, affine), path)


def test_bad_config_key_and_type(cohort_copy, tmp_path, capsys):
    base = ["train", "--cohort", cohort_copy, "--out", tmp_path / "r", "--quiet"]
    _fails(base + ["--set", "train.stepz=5"], capsys, "unknown key train.stepz")
    _fails(base + ["--set", "train.steps=many"], capsys, "train.steps must be an integer, got 'many'")
    _fails(base + ["--set", "patch.size=99"], capsys, "patch.size=99 is larger than the grid")
    cfg = tmp_path / "bad.toml"
    cfg.write_text("[train]\nsteps = 10\n[mystery]\nx = 1\n")
    _fails(["train", cfg, "--out", tmp_path / "r2"], capsys, "unknown section [mystery]")
    assert not (tmp_path / "r").exists() and not (tmp_path / "r2").exists()


@pytest.mark.parametrize(
    "damage, match",
    [
        ("shift", "affine"),
        ("shape", "shape"),
        ("nan", "non-finite"),
        ("4d", "(50, 59, 48, 3), expected a 3D image"),
        ("missing", "not found"),
        ("corrupt", "ctl02"),
        ("no_controls", "controls"),
        ("role", "patient"),
    ],
)
def test_bad_cohort_exits_2_with_one_line(damage, match, cohort_copy, tmp_path, capsys):
    rows = _rows(cohort_copy)
    img = cohort_copy.parent / rows[1]["T1w"]
    if damage == "shift":
        _rewrite_image(img, lambda d, a: (d, a + np.array([[0, 0, 0, 2.0]] * 3 + [[0, 0, 0, 0]])))
    elif damage == "shape":
        _rewrite_image(img, lambda d, a: (d[:-1], a))
    elif damage == "nan":
        _rewrite_image(img, lambda d, a: (np.where(d == d.max(), np.nan, d).astype(np.float32), a))
    elif damage == "4d":
        _rewrite_image(img, lambda d, a: (np.stack([d, d, d], -1), a))
    elif damage == "missing":
        img.unlink()
    elif damage == "corrupt":
        img.write_bytes(b"\x1f\x8b this is not a NIfTI file")
    elif damage == "no_controls":
        _write_manifest(cohort_copy, [r for r in rows if r["role"] != "control"])
    elif damage == "role":
        rows[2]["role"] = "patient"
        _write_manifest(cohort_copy, rows)
    _fails(["train", "--cohort", cohort_copy, "--out", tmp_path / "r", "--quiet", *sum([["--set", o] for o in TINY_OVERRIDES], [])],
           capsys, match)
    assert not (tmp_path / "r").exists()


def test_export_and_embed_by_command(tiny_run, tiny_manifest, tmp_path, capsys):
    bundle = tmp_path / "site.safetensors"
    assert main(["export", str(tiny_run["run_dir"]), "--out", str(bundle)]) == 0
    row = _rows(tiny_manifest)[-1]
    root = tiny_manifest.parent
    out = tmp_path / "emb.nii.gz"
    argv = ["embed", str(bundle), "--image", f"T1w={root / row['T1w']}", "--image", f"FLAIR={root / row['FLAIR']}",
            "--mask", str(root / row["mask"]), "--out", str(out), "--quiet"]
    assert main(argv) == 0
    assert "research use only" in capsys.readouterr().out
    enc = load_encoder(bundle)
    subject = load_subject({"T1w": root / row["T1w"], "FLAIR": root / row["FLAIR"]}, mask=root / row["mask"])
    got = np.moveaxis(nib.load(out).get_fdata(dtype=np.float32), -1, 0)
    np.testing.assert_allclose(got, enc.embed_volume(subject.data, subject.mask), atol=1e-6)
    assert out.with_name("emb.json").is_file()
    # Many subjects at once from a manifest, as 4D maps.
    assert main(["embed", str(bundle), "--manifest", str(tiny_manifest), "--maps", "--out", str(tmp_path / "maps"),
                 "--quiet"]) == 0
    assert len(list((tmp_path / "maps").glob("*_embedding.nii.gz"))) == len(_rows(tiny_manifest))


def test_bad_bundle_and_embed_input(tiny_run, tiny_manifest, tmp_path, capsys):
    row = _rows(tiny_manifest)[0]
    root = tiny_manifest.parent
    images = ["--image", f"T1w={root / row['T1w']}", "--image", f"FLAIR={root / row['FLAIR']}"]
    tampered = tmp_path / "tampered.safetensors"
    data = bytearray(tiny_run["bundle"].read_bytes())
    data[-3] ^= 0xFF  # a byte of the last tensor: the header still parses
    tampered.write_bytes(bytes(data))
    _fails(["embed", tampered, *images, "--out", tmp_path / "e.nii.gz"], capsys, "checksum mismatch")
    _fails(["embed", tmp_path / "none.safetensors", *images, "--out", tmp_path / "e.nii.gz"], capsys, "not found")
    _fails(["embed", tiny_run["bundle"], images[0], images[1], "--out", tmp_path / "e.nii.gz"], capsys, "add --image FLAIR=")
    _fails(["embed", tiny_run["bundle"], *images, "--out", tmp_path / "e.txt"], capsys, "end it in .nii.gz")
    _fails(["embed", tiny_run["bundle"], "--image", "T1w", "--out", tmp_path / "e.nii.gz"], capsys, "expected NAME=PATH")
    _fails(["export", tmp_path / "nowhere"], capsys, "is not a finished run")
    assert not list(tmp_path.glob("e.*"))


def test_run_dir_is_never_clobbered(tiny_run, tiny_manifest, tmp_path, capsys):
    _fails(["train", "--cohort", tiny_manifest, "--out", tiny_run["run_dir"], "--quiet"], capsys, "already holds a run")
    other = tmp_path / "mine"
    other.mkdir()
    (other / "notes.txt").write_text("precious")
    _fails(["train", "--cohort", tiny_manifest, "--out", other, "--overwrite", "--quiet"], capsys, "not a twinpatch run")
    assert (other / "notes.txt").read_text() == "precious"


def test_argument_errors_are_one_line(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["train", "--bogus"])
    assert exc.value.code == 2
    assert len(capsys.readouterr().err.strip().splitlines()) == 1


def test_train_py_shim_passes_arguments(tmp_path):
    # `python train.py --help` is `twinpatch train --help`.
    out = subprocess.run([sys.executable, "train.py", "--help"], capture_output=True, text=True,
                         cwd=__import__("pathlib").Path(__file__).parents[1])
    assert out.returncode == 0 and "twinpatch train" in out.stdout


def test_inspect_and_onnx_export(tiny_run, tmp_path, capsys):
    assert main(["inspect", str(tiny_run["bundle"])]) == 0
    out = capsys.readouterr().out
    assert "checksum        OK" in out and "axial plane" in out
    assert main(["inspect", str(tiny_run["bundle"]), "--json"]) == 0
    assert '"weights_sha256"' in capsys.readouterr().out
    bundle = tmp_path / "b.safetensors"
    assert main(["export", str(tiny_run["run_dir"]), "--out", str(bundle), "--onnx"]) == 0
    assert bundle.with_suffix(".onnx").is_file()
    data = bytearray(bundle.read_bytes())
    data[-1] ^= 0x01
    bundle.write_bytes(bytes(data))
    _fails(["inspect", bundle], capsys, "checksum mismatch")


def test_prepare_and_qc_commands(tiny_manifest, tmp_path, capsys):
    cache = tmp_path / "cache"
    assert main(["prepare", "--manifest", str(tiny_manifest), "--out", str(cache), "--quiet"]) == 0
    assert "built" in capsys.readouterr().out
    assert main(["prepare", "--manifest", str(tiny_manifest), "--out", str(cache), "--quiet"]) == 0
    assert "unchanged" in capsys.readouterr().out
    assert main(["qc", str(cache), "--quiet", "--no-montage"]) == 0
    assert "8 subjects checked" in capsys.readouterr().out
    _fails(["prepare", "--bids", tmp_path, "--out", tmp_path / "c2"], capsys, "--bids needs --space LABEL")
    _fails(["prepare", "--manifest", tiny_manifest, "--space", "MNI", "--out", tmp_path / "c2"], capsys,
           "go with --bids")
