"""Calibrated verdict thresholds, noise model and evaluation on invented demo-style records."""

from __future__ import annotations

import random
from typing import Any

import numpy as np
import pytest

from service.engine import (
    Codec,
    DenseRule,
    ParameterError,
    Schema,
    VerdictThresholds,
    judge,
    settle,
)
from service.engine.calibration import calibrate, cue_statistics
from service.engine.noise import make_cue, recombined_cue, typo

SCHEMA = Schema.from_dict(
    {
        "fields": [
            {"name": "taxon", "kind": "text", "units": 512},
            {"name": "collector", "kind": "text", "units": 512},
            {"name": "site_code", "kind": "category", "units": 128},
            {"name": "depth_m", "kind": "number", "units": 256, "tolerance": 2.0},
        ]
    }
)

_GENERA = ["Nassa", "Patella", "Mytilus", "Littorina", "Gibbula", "Cerastoderma", "Ensis"]
_EPITHETS = ["reticulata", "vulgata", "edulis", "obtusata", "umbilicalis", "edule", "siliqua"]
_COLLECTORS = ["Ines Varga", "Tomas Ekwall", "Ruth Amadi", "Lio Brandt", "Mara Soto"]


def _records(n: int, seed: int) -> list[dict[str, Any]]:
    """Invented specimen records with the correlation real registries have (demo data)."""
    rng = random.Random(seed)
    out = []
    for _ in range(n):
        out.append(
            {
                "taxon": f"{rng.choice(_GENERA)} {rng.choice(_EPITHETS)}",
                "collector": rng.choice(_COLLECTORS),
                "site_code": f"SMP-{rng.choice('NSEW')}{rng.randint(1, 6)}",
                "depth_m": round(rng.uniform(0, 60), 1),
            }
        )
    return out


@pytest.fixture(scope="module")
def collection() -> dict[str, Any]:
    records = _records(400, seed=3)
    codec = Codec(SCHEMA, seed=9)
    rule = DenseRule().fit(codec.encode_records(records))
    return {"records": records, "codec": codec, "rule": rule}


class TestNoise:
    def test_typo_changes_exactly_one_edit(self) -> None:
        rng = random.Random(0)
        for _ in range(200):
            word = "Cerastoderma"
            out = typo(word, rng)
            assert out != word
            assert abs(len(out) - len(word)) <= 1

    def test_cues_are_reproducible_from_a_seed(self, collection: dict[str, Any]) -> None:
        rec = collection["records"][0]
        a = make_cue(rec, SCHEMA, "mixed", random.Random(5))
        b = make_cue(rec, SCHEMA, "mixed", random.Random(5))
        assert a == b

    def test_drop_keeps_at_least_one_field_and_drops_one(self, collection: dict[str, Any]) -> None:
        rng = random.Random(1)
        for rec in collection["records"][:50]:
            cue = make_cue(rec, SCHEMA, "drop", rng)
            assert 1 <= len(cue) < len(SCHEMA.fields)

    def test_jitter_stays_within_half_the_tolerance(self, collection: dict[str, Any]) -> None:
        rng = random.Random(2)
        for rec in collection["records"][:50]:
            cue = make_cue(rec, SCHEMA, "jitter", rng)
            assert abs(cue["depth_m"] - rec["depth_m"]) <= 1.0 + 1e-9

    def test_recombined_cue_takes_fields_from_several_records(
        self, collection: dict[str, Any]
    ) -> None:
        cue = recombined_cue(collection["records"], SCHEMA, random.Random(3), n_fields=3)
        assert len(cue) == 3

    def test_unknown_kind_is_rejected(self, collection: dict[str, Any]) -> None:
        with pytest.raises(ParameterError, match="kind must be one of"):
            make_cue(collection["records"][0], SCHEMA, "smudge", random.Random(0))


class TestCalibrate:
    def test_thresholds_are_stable_across_calibration_seeds(
        self, collection: dict[str, Any]
    ) -> None:
        from service.engine.evaluation import evaluate, make_cue_sets

        records = collection["records"]
        found = [
            calibrate(collection["rule"], collection["codec"], records, seed=s) for s in range(3)
        ]
        margins = [r.thresholds.min_cue_margin for r in found]
        fields = [r.thresholds.min_field_agreement for r in found]
        # 1,000 cues per seed move the chosen quantiles by a few hundredths at most
        assert max(margins) - min(margins) <= 0.08  # type: ignore[type-var,operator]
        assert max(fields) - min(fields) <= 0.15  # type: ignore[type-var,operator]
        sets = make_cue_sets(records, SCHEMA, kinds=("typo", "drop"), n_per_kind=150, seed=42)
        rows = [
            evaluate(collection["rule"], collection["codec"], sets, r.thresholds) for r in found
        ]
        for kind in range(2):
            rates = [r[kind].recalled_rate for r in rows]
            assert max(rates) - min(rates) <= 0.15
            assert all(r[kind].wrong_among_recalled <= 0.01 for r in rows)

    def test_calibration_meets_its_own_error_budget(self, collection: dict[str, Any]) -> None:
        result = calibrate(collection["rule"], collection["codec"], collection["records"], seed=1)
        assert result.null_accept_rate <= 0.02
        assert result.wrong_accept_rate <= 0.01
        # invented records built to be confusable: most fragments fit several of them
        assert result.positive_accept_rate > 0.1

    def test_a_cue_fitting_no_record_is_spurious_far(self, collection: dict[str, Any]) -> None:
        result = calibrate(collection["rule"], collection["codec"], collection["records"], seed=1)
        cue = collection["codec"].encode_cue(
            {"taxon": "Zzyzx quantumii", "collector": "Nobody Anywhere"}
        )[None, :]
        res = settle(collection["rule"], cue)
        v = judge(collection["rule"].patterns_, cue, res, result.thresholds)
        assert (v.verdict[0], v.reason[0]) == ("spurious", "far")

    def test_a_cue_fitting_two_records_equally_is_spurious_ambiguous(
        self, collection: dict[str, Any]
    ) -> None:
        records = collection["records"]
        result = calibrate(collection["rule"], collection["codec"], records, seed=1)
        # two stored records share taxon and collector; a cue of just those fits both
        pairs: dict[tuple[str, str], list[int]] = {}
        for i, r in enumerate(records):
            pairs.setdefault((r["taxon"], r["collector"]), []).append(i)
        shared = next(k for k, v in pairs.items() if len(v) >= 2)
        cue = collection["codec"].encode_cue({"taxon": shared[0], "collector": shared[1]})[None]
        res = settle(collection["rule"], cue)
        v = judge(collection["rule"].patterns_, cue, res, result.thresholds)
        assert v.verdict[0] == "spurious"
        assert v.reason[0] in ("ambiguous", "mixture")
        assert v.verdict[0] != "recalled"

    def test_a_clean_full_cue_is_recalled(self, collection: dict[str, Any]) -> None:
        records = collection["records"]
        result = calibrate(collection["rule"], collection["codec"], records, seed=1)
        # pick the record that stands most apart from the others (on these confusable records,
        # siblings sharing taxon, collector and site overlap by over 0.8 and are rightly called
        # ambiguous)
        x = collection["rule"].patterns_.astype(np.float32)
        g = x @ x.T / x.shape[1]
        np.fill_diagonal(g, -1.0)
        i = int(np.argmin(g.max(axis=1)))
        assert g[i].max() < 0.7
        cue = collection["codec"].encode_cue(records[i])[None]
        res = settle(collection["rule"], cue)
        v = judge(collection["rule"].patterns_, cue, res, result.thresholds)
        assert (v.verdict[0], int(v.best[0])) == ("recalled", i)

    def test_leave_one_out_statistics_mask_the_own_record(self, collection: dict[str, Any]) -> None:
        patterns = collection["rule"].patterns_
        cues = patterns[:5].astype(np.int8)
        best, top, _, _ = cue_statistics(patterns, cues)
        assert list(best) == [0, 1, 2, 3, 4] or np.allclose(top, 1.0)
        best_loo, _, _, _ = cue_statistics(patterns, cues, exclude=np.arange(5))
        assert all(b != i for i, b in enumerate(best_loo))

    def test_bad_arguments_raise_engine_errors(self, collection: dict[str, Any]) -> None:
        with pytest.raises(ParameterError):
            calibrate(collection["rule"], collection["codec"], collection["records"], n_cues=1)
        with pytest.raises(ParameterError):
            calibrate(collection["rule"], collection["codec"], collection["records"], null_rate=2.0)

    def test_thresholds_object_round_trips(self) -> None:
        th = VerdictThresholds(min_agreement=0.7, min_cue_margin=0.05)
        assert VerdictThresholds(**th.to_dict()) == th
