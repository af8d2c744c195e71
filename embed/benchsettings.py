"""Bench settings: one frozen dataclass, read from a dict (TOML / ``--set``), checked in one place."""

from __future__ import annotations

from dataclasses import dataclass, field, fields

from .cohort import NORMALISATIONS
from .errors import ConfigError
from .implant import BENCH_KINDS
from .scorers import make_scorer


@dataclass(frozen=True)
class BenchSettings:
    """Bench settings (TOML/JSON-friendly). levels: kind -> lesion strengths (see implant.plan_lesion)."""
    seed: int = 0
    kinds: tuple = tuple(BENCH_KINDS)
    radii_mm: tuple = (5.0, 10.0)
    levels: dict = field(default_factory=lambda: {"intensity": [0.05, 0.15], "texture": [2.0, 4.0],
                                                  "geometry": [2.0, 4.0], "mixed": [2.0, 4.0]})
    repeats: int = 2
    heldout: tuple = ()
    scorer: str = "ocsvm"
    top_fraction: float = 0.01
    connectivity: int = 26
    ks: tuple = (1, 3, 5, 10)
    n_boot: int = 2000
    examples: int = 1
    tissue_contrast: str = ""
    flair_contrast: str = ""
    precision: str = "fp32"
    normalisation: str = "zscore"

    @classmethod
    def from_dict(cls, d: dict | None) -> "BenchSettings":
        d = dict(d or {})
        names = {f.name for f in fields(cls)}
        bad = sorted(set(d) - names)
        if bad:
            raise ConfigError(f"bench settings: unknown key {bad[0]!r}; valid keys are {', '.join(sorted(names))}")
        for k in ("kinds", "radii_mm", "heldout", "ks"):
            if k in d:
                if not isinstance(d[k], (list, tuple)):
                    raise ConfigError(f"bench settings: {k}={d[k]!r} must be a list, e.g. {k} = {list(getattr(cls(), k))!r}")
                d[k] = tuple(d[k])
        if "levels" in d:
            if not isinstance(d["levels"], dict):
                raise ConfigError(f"bench settings: levels={d['levels']!r} must be a table, e.g. levels = {{texture = [2.0, 4.0]}}")
            d["levels"] = {**cls().levels, **d["levels"]}
        s = cls(**d)
        s.check()
        return s

    def check(self) -> None:
        def need(ok, key, what):
            if not ok:
                raise ConfigError(f"bench settings: {key}={getattr(self, key)!r} must be {what}")

        def number(v, low=0.0):
            return isinstance(v, (int, float)) and not isinstance(v, bool) and v > low

        def integer(v, low):
            return isinstance(v, int) and not isinstance(v, bool) and v >= low
        need(isinstance(self.seed, int) and self.seed >= 0, "seed", "an integer >= 0")
        need(len(self.kinds) > 0 and len(set(self.kinds)) == len(self.kinds) and all(k in BENCH_KINDS for k in self.kinds),
             "kinds", f"a non-empty list of distinct kinds among {list(BENCH_KINDS)}")
        need(len(self.radii_mm) > 0 and all(number(r) for r in self.radii_mm), "radii_mm", "a non-empty list of positive numbers")
        need(isinstance(self.levels, dict) and all(isinstance(self.levels.get(k), (list, tuple)) and self.levels[k]
                                                   and all(number(v) for v in self.levels[k]) for k in self.kinds),
             "levels", "a table of non-empty lists of positive numbers, one per kind")
        need(integer(self.repeats, 1), "repeats", "an integer >= 1")
        need(all(isinstance(h, str) for h in self.heldout), "heldout", "a list of control subject ids")
        need(number(self.top_fraction) and self.top_fraction < 0.5, "top_fraction", "in (0, 0.5)")
        need(self.connectivity in (6, 18, 26), "connectivity", "6, 18 or 26")
        need(len(self.ks) > 0 and all(integer(k, 1) for k in self.ks), "ks", "a list of integers >= 1")
        need(integer(self.n_boot, 100), "n_boot", "an integer >= 100")
        need(integer(self.examples, 0), "examples", "an integer >= 0")
        need(isinstance(self.tissue_contrast, str), "tissue_contrast", "a contrast name (\"\" = the first)")
        need(isinstance(self.flair_contrast, str), "flair_contrast", "a contrast name (\"\" = the one called FLAIR)")
        need(self.precision in ("fp32", "bf16"), "precision", "fp32 or bf16")
        need(self.normalisation in NORMALISATIONS, "normalisation", f"one of {NORMALISATIONS}")
        if not isinstance(self.scorer, str):
            raise ConfigError(f"bench settings: scorer={self.scorer!r} must be a scorer name (ocsvm, gaussian, knn)")
        make_scorer(self.scorer)
