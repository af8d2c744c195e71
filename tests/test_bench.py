"""The bench end to end on the tiny cohort, its scoring shortcut against the plain path, its errors."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import ndimage
from sklearn.metrics import roc_auc_score

from embed.bench import BenchSettings, _score_ocsvm, make_cases, run_bench
from embed.cli import main
from embed.errors import ConfigError, InputError
from embed.jobs import load_any_cohort
from embed.scorers import Standardiser, loo_scores, make_scorer

SETTINGS = {"kinds": ["intensity", "texture"], "radii_mm": [8.0], "levels": {"intensity": [0.2], "texture": [4.0]},
            "repeats": 2, "n_boot": 200, "examples": 1}


@pytest.fixture(scope="module")
def bench(tiny_run, tiny_manifest, tmp_path_factory):
    out = tmp_path_factory.mktemp("bench") / "b"
    metrics = run_bench({"tiny": tiny_run["bundle"]}, tiny_manifest, out, settings=SETTINGS, progress=False)
    return out, metrics


def test_score_ocsvm_equals_scoring_whole_cases():
    """Scoring only the changed voxels, several cases stacked per voxel, equals scoring each whole case
    with a scorer fitted on all voxels and the leave-one-out standardisation (embed.scorers)."""
    rng = np.random.default_rng(0)
    S, V, D = 6, 50, 3
    fit = rng.standard_normal((S, V, D)).astype(np.float32)
    held = rng.standard_normal((2, V, D)).astype(np.float32)
    idx = [np.array([3, 4, 5, 10]), np.array([4, 5, 6]), np.array([5, 49]), np.array([0, 5])]  # voxel 5 four times
    owner = [0, 0, 1, 1]
    queries = [(i, rng.standard_normal((len(i), D)).astype(np.float32)) for i in idx]
    s = BenchSettings.from_dict({})
    z_held, z_q = _score_ocsvm(fit, held, queries, s, False, "t")
    std = Standardiser.from_loo(loo_scores(make_scorer("ocsvm"), fit))
    model = make_scorer("ocsvm").fit(fit)
    np.testing.assert_allclose(z_held, std.apply(model.score_many(held)), rtol=0, atol=1e-9)
    for (i, f), h, z in zip(queries, owner, z_q):
        case = held[h].copy()
        case[i] = f
        np.testing.assert_allclose(z, std.apply(model.score(case))[i], rtol=0, atol=1e-9)


def test_bench_writes_its_folder(bench):
    out, m = bench
    for name in ("metrics.json", "table.csv", "table.md", "sensitivity.png", "contrast.png"):
        assert (out / name).is_file(), name
    assert any(f.startswith("example_") for f in m["figures"])
    assert json.loads((out / "metrics.json").read_text()) == json.loads(json.dumps(m))
    names = [x["name"] for x in m["methods"]]
    assert names == ["tiny", "tiny+intensities", "intensities", "texture", "z-score", "FLAIR intensity"]
    assert "not a diagnostic device" in (out / "table.md").read_text()
    assert "n" in (out / "table.csv").read_text().splitlines()[0].split(",")


def test_heldout_controls_are_the_ones_the_encoder_never_saw(bench, tiny_run):
    _, m = bench
    card = json.loads((tiny_run["run_dir"] / "run.json").read_text())["training"]
    assert sorted(m["heldout"]) == sorted(card["val_controls"])
    assert sorted(m["fit_controls"]) == sorted(card["train_controls"])
    assert len(m["lesions"]) == len(m["heldout"]) * 2 * 2  # controls x kinds x repeats
    for row in m["summary"]:
        if row["group"] == "all" and row["kind"] != "all":
            assert row["n"] == sum(les["kind"] == row["kind"] for les in m["lesions"])


def test_flair_method_auroc_and_false_positive_clusters_match_references(bench, tiny_manifest):
    """The FLAIR-intensity method scores a voxel by its FLAIR value: per-lesion AUROC must equal
    scikit-learn's roc_auc_score on the re-implanted case, and false-positive clusters must equal
    the 26-connected components scipy.ndimage.label finds above the method's threshold."""
    _, m = bench
    cohort = load_any_cohort(tiny_manifest, "zscore", progress=False)
    held = [cohort.subjects.index(h) for h in m["heldout"]]
    vmask = np.asarray(cohort.mask)
    cases = make_cases(cohort, held, vmask, BenchSettings.from_dict(SETTINGS), progress=False)
    flair = cohort.contrasts.index("FLAIR")
    res = m["results"]["FLAIR intensity"]
    for c in cases:
        vol = np.array(cohort.data[held[c.control]])
        vol[(slice(None), *c.box)] = c.values
        want = roc_auc_score(c.lesion[vmask], vol[flair][vmask])
        assert res["per_lesion"][c.id]["auroc"] == pytest.approx(want, abs=1e-12)
    pooled = np.concatenate([np.asarray(cohort.data[i][flair])[vmask] for i in held])
    cut = np.quantile(pooled.astype(np.float64), 1 - 0.01)
    for h, i in enumerate(held):
        above = vmask & (np.asarray(cohort.data[i][flair], dtype=np.float64) >= cut)
        _, n = ndimage.label(above, structure=np.ones((3, 3, 3)))
        assert res["fp_clusters"][h] == n


def test_zscore_and_intensities_share_features_so_share_signal_ratio(bench):
    _, m = bench
    a, b = m["results"]["z-score"]["per_lesion"], m["results"]["intensities"]["per_lesion"]
    for k in a:
        assert a[k]["signal_ratio"] == pytest.approx(b[k]["signal_ratio"])
    # a FLAIR rise moves the FLAIR feature; a strong one (20 %) by more than the controls vary
    rises = [les["id"] for les in m["lesions"] if les["kind"] == "intensity"]
    flair = m["results"]["FLAIR intensity"]["per_lesion"]
    assert np.mean([flair[k]["signal_ratio"] for k in rises]) > 1


def test_report_page_of_a_bench(bench):
    out, _ = bench
    assert main(["report", str(out)]) == 0
    page = (out / "report.html").read_text()
    assert "data:image/png;base64" in page and "FLAIR intensity" in page


@pytest.mark.parametrize("settings, match", [
    ({"repeat": 2}, r"unknown key 'repeat'"),
    ({"kinds": ["colour"]}, r"kinds=\('colour',\) must be a non-empty list"),
    ({"radii_mm": [-1]}, r"radii_mm=\(-1,\) must be"),
    ({"top_fraction": 0.7}, r"top_fraction=0.7 must be in \(0, 0.5\)"),
    ({"connectivity": 4}, r"connectivity=4 must be 6, 18 or 26"),
    ({"scorer": "forest"}, r"unknown scorer 'forest'"),
    ({"levels": [2.0]}, r"levels=\[2.0\] must be a table"),
    ({"levels": {"texture": ["a"]}}, r"levels=.* must be a table of non-empty lists of positive numbers"),
    ({"kinds": "texture"}, r"kinds='texture' must be a list"),
    ({"kinds": ["texture", "texture"]}, r"a non-empty list of distinct kinds"),
    ({"examples": -1}, r"examples=-1 must be an integer >= 0"),
    ({"normalisation": "minmax"}, r"normalisation='minmax' must be one of"),
    ({"repeats": True}, r"repeats=True must be an integer >= 1"),
])
def test_bad_settings(settings, match):
    with pytest.raises(ConfigError, match=match):
        BenchSettings.from_dict(settings)


def test_heldout_rules(tiny_run, tiny_manifest, tmp_path):
    bundle = {"tiny": tiny_run["bundle"]}
    with pytest.raises(InputError, match=r"held-out control 'nobody' is not a control"):
        run_bench(bundle, tiny_manifest, tmp_path, settings={"heldout": ["nobody"]}, progress=False)
    card = json.loads((tiny_run["run_dir"] / "run.json").read_text())["training"]
    with pytest.raises(InputError, match=r"trained on held-out control"):
        run_bench(bundle, tiny_manifest, tmp_path, settings={"heldout": card["train_controls"][:1]}, progress=False)
    with pytest.raises(InputError, match=r"without an encoder, name the held-out controls"):
        run_bench({}, tiny_manifest, tmp_path, progress=False)
    with pytest.raises(InputError, match=r"need at least 1 held-out control and 3 controls to fit"):
        run_bench({}, tiny_manifest, tmp_path, settings={"heldout": card["train_controls"]}, progress=False)
    with pytest.raises(InputError, match=r"two methods are called 'texture'; name the encoder differently"):
        run_bench({"texture": tiny_run["bundle"]}, tiny_manifest, tmp_path, settings=SETTINGS, progress=False)
    assert not (tmp_path / "metrics.json").exists()


def test_cli_bench_errors(tmp_path, tiny_manifest, capsys):
    assert main(["bench", str(tmp_path / "missing.safetensors"), "--cohort", str(tiny_manifest),
                 "--out", str(tmp_path / "b")]) == 2
    assert "does not exist" in capsys.readouterr().err
    assert main(["bench", "--cohort", str(tiny_manifest), "--out", str(tmp_path / "b"), "--set", "nokey"]) == 2
    assert "expected KEY=VALUE" in capsys.readouterr().err
    assert main(["report", str(tmp_path)]) == 2
    assert "neither a bench folder" in capsys.readouterr().err


def test_cli_settings_and_bundle_names(tmp_path):
    from embed.cli_eval import parse_bundles, parse_settings

    got = parse_settings(["repeats=1", 'kinds=["texture", "mixed"]', "top_fraction=0.02", "flair_contrast=FLAIR",
                          "radii_mm=[4.0]"])
    assert got == {"repeats": 1, "kinds": ["texture", "mixed"], "top_fraction": 0.02, "flair_contrast": "FLAIR",
                   "radii_mm": [4.0]}  # TOML values; a bare word stays a string
    with pytest.raises(ConfigError, match=r"expected KEY=VALUE"):
        parse_settings(["=3"])
    run = tmp_path / "runs" / "site_v1"
    run.mkdir(parents=True)
    (run / "encoder.safetensors").write_bytes(b"x")
    (tmp_path / "plain.safetensors").write_bytes(b"x")
    assert parse_bundles([str(run / "encoder.safetensors"), f"b={tmp_path / 'plain.safetensors'}"]) == \
        {"site_v1": run / "encoder.safetensors", "b": tmp_path / "plain.safetensors"}
    with pytest.raises(InputError, match=r"two bundles are called 'b'"):
        parse_bundles([f"b={tmp_path / 'plain.safetensors'}", f"b={run / 'encoder.safetensors'}"])


def test_summary_sensitivity_equals_a_count_of_the_ranks(bench):
    """The bench's summary sens@k (what figures plot) is the share of lesions ranked <= k."""
    from embed.figures import sensitivity_curve

    _, m = bench
    for method in m["results"]:
        ranks = [m["results"][method]["per_lesion"][les["id"]]["rank"] for les in m["lesions"]]
        counted = [np.mean([r is not None and r <= k for r in ranks]) for k in m["ks"]]
        assert sensitivity_curve(m, method, "all") == pytest.approx(counted)


def test_an_encoder_of_one_contrast_is_benched_on_its_own_channel(tiny_manifest, tmp_path):
    """cohort.contrasts = ["FLAIR"] trains a one-contrast encoder; the bench feeds it the cohort's
    FLAIR channel only, and its concatenation carries every contrast's intensities."""
    from embed.config import load_config
    from embed.jobs import train_job

    from .conftest import TINY_OVERRIDES

    cfg = load_config(None, TINY_OVERRIDES + ["train.steps=10", 'cohort.contrasts=["FLAIR"]',
                                              f'cohort.manifest="{tiny_manifest.as_posix()}"'])
    run = train_job(cfg, tmp_path / "run", progress=False, log=lambda m: None)
    card = json.loads((run["run_dir"] / "run.json").read_text())
    assert card["contrasts"] == ["FLAIR"] and card["architecture"]["in_channels"] == 1
    settings = {**SETTINGS, "kinds": ["texture"], "repeats": 1, "examples": 0}
    m = run_bench({"flair": run["bundle"]}, tiny_manifest, tmp_path / "b", baselines=False, settings=settings,
                  progress=False)
    assert [x["name"] for x in m["methods"]] == ["flair", "flair+intensities"]
    per = m["results"]["flair"]["per_lesion"]
    assert per and all(0 <= v["auroc"] <= 1 and v["signal_ratio"] >= 0 for v in per.values())
