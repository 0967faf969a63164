"""Tests of the record codec: schema validation, item vectors, per-kind codes and decoding.

Scenarios are a coastal field station's specimen registry. Statistical checks state their
tolerance beside them; every random draw comes from a seeded generator.
"""

from __future__ import annotations

import datetime
import hashlib
import itertools
import math
import string
from collections import Counter
from math import comb
from typing import Any, ClassVar

import numpy as np
import numpy.typing as npt
import pytest

from service.engine._items import CODEC_VERSION, item_bytes, item_vector, sum_of_items
from service.engine.codec import (
    IDENTITY_BLOCK,
    MAX_FIELDS,
    Codec,
    FieldMatch,
    FieldSpec,
    Schema,
)
from service.engine.errors import (
    ParameterError,
    RecordError,
    SchemaError,
    ShapeError,
    StateValueError,
)

SEED = 20240611


def registry_schema(identity_units: int = 0) -> Schema:
    return Schema.from_dict(
        {
            "fields": [
                {"name": "site", "kind": "category"},
                {"name": "species", "kind": "text"},
                {
                    "name": "depth_m",
                    "kind": "number",
                    "tolerance": 5.0,
                    "maximum": 500.0,
                    "minimum": 0.0,
                },
                {"name": "collected_on", "kind": "date", "minimum": "2000-01-01"},
                {"name": "collector_code", "kind": "category", "nullable": False},
            ],
            "identity_units": identity_units,
        }
    )


SPECIMEN: dict[str, object] = {
    "site": "North Jetty",
    "species": "Patella vulgata",
    "depth_m": 12.5,
    "collected_on": "2023-06-14",
    "collector_code": "RW-07",
}


def overlap(a: npt.ArrayLike, b: npt.ArrayLike) -> float:
    x = np.asarray(a, dtype=np.float64)
    y = np.asarray(b, dtype=np.float64)
    return float(x @ y) / x.size


def random_words(rng: np.random.Generator, count: int, length: int) -> list[str]:
    letters = list(string.ascii_lowercase)
    return ["".join(rng.choice(letters, length)) for _ in range(count)]


def text_codec(units: int = 512, bigrams: bool = True, seed: int = SEED) -> Codec:
    return Codec(Schema((FieldSpec("species", "text", units=units, bigrams=bigrams),)), seed)


def sign_agreement(shared: int, own: int) -> float:
    """Exact E[sign(A + B1) · sign(A + B2)] for sums of independent ±1 values.

    A sums ``shared`` values, B1 and B2 ``own`` values each; a zero sum is broken by an
    independent coin, as the per-value tie vector does. This is our own derivation: a direct
    enumeration of the binomial distributions, no published source needed.
    """

    def pmf(n: int) -> dict[int, float]:
        return {2 * k - n: comb(n, k) / 2**n for k in range(n + 1)}

    total = 0.0
    for a, pa in pmf(shared).items():
        for b1, p1 in pmf(own).items():
            for b2, p2 in pmf(own).items():
                total += pa * p1 * p2 * float(np.sign(a + b1) * np.sign(a + b2))
    return total


class TestItemVectors:
    def test_golden_vectors_never_change(self) -> None:
        # Computed once with CODEC_VERSION 1 and pasted; a change here breaks every stored memory.
        assert CODEC_VERSION == 1
        golden = {
            (2024, "site", "value", "north jetty"): [
                1, 1, -1, 1, 1, -1, 1, -1, -1, 1, 1, -1, -1, -1, 1, -1,
                1, 1, -1, 1, -1, 1, -1, -1, -1, -1, 1, 1, 1, 1, -1, -1,
            ],
            (2024, "species", "gram", "\x02\x02p"): [
                -1, -1, -1, 1, 1, -1, 1, 1, -1, 1, 1, 1, -1, -1, 1, 1,
                1, 1, 1, 1, -1, -1, 1, 1, 1, -1, -1, -1, -1, 1, 1, -1,
            ],
            (-1, "", "identity", "SPC-000117"): [
                1, -1, -1, 1, 1, -1, 1, -1, -1, -1, -1, -1, -1, -1, 1, 1,
                1, 1, 1, 1, -1, 1, 1, 1, -1, -1, 1, -1, 1, -1, -1, -1,
            ],
        }  # fmt: skip
        for (seed, field, role, token), expected in golden.items():
            assert item_vector(seed, field, role, token, 32).tolist() == expected

    def test_golden_record_pattern_never_changes(self) -> None:
        schema = Schema(
            (
                FieldSpec("species", "text", units=64),
                FieldSpec("depth_m", "number", units=64, tolerance=5.0),
            )
        )
        pattern = Codec(schema, 2024).encode_record({"species": "Patella vulgata", "depth_m": 12.5})
        # Computed once with CODEC_VERSION 1 and pasted.
        assert pattern[:32].tolist() == [
            -1, -1, 1, -1, 1, -1, -1, 1, -1, -1, -1, 1, 1, -1, 1, 1,
            1, 1, 1, -1, 1, 1, 1, -1, -1, -1, 1, -1, 1, 1, -1, 1,
        ]  # fmt: skip
        assert pattern[64:96].tolist() == [
            -1, -1, 1, -1, -1, 1, -1, -1, -1, -1, 1, -1, 1, -1, 1, -1,
            1, 1, 1, 1, -1, -1, -1, -1, 1, 1, 1, 1, 1, 1, -1, 1,
        ]  # fmt: skip

    def test_item_vector_is_the_documented_shake256_bit_stream(self) -> None:
        def part(text: str) -> bytes:
            data = text.encode("utf-8")
            return len(data).to_bytes(4, "big") + data

        message = b"cuebank.item" + b"".join(
            part(p) for p in ("1", "77", "site", "value", "kelp bed 2")
        )
        assert item_bytes(77, "site", "value", "kelp bed 2") == message
        bits = np.unpackbits(np.frombuffer(hashlib.shake_256(message).digest(3), np.uint8))
        expected = np.where(bits[:20] == 1, 1, -1)
        assert item_vector(77, "site", "value", "kelp bed 2", 20).tolist() == expected.tolist()

    def test_shorter_vectors_are_prefixes_of_longer_ones(self) -> None:
        long = item_vector(5, "site", "value", "dunes", 200)
        assert (item_vector(5, "site", "value", "dunes", 75) == long[:75]).all()

    def test_cached_vectors_are_read_only(self) -> None:
        vector = item_vector(5, "site", "value", "dunes", 16)
        with pytest.raises(ValueError, match="read-only"):
            vector[0] = 0

    def test_roles_keep_equal_tokens_apart(self) -> None:
        a = item_vector(5, "site", "value", "null", 4096)
        b = item_vector(5, "site", "null", "null", 4096)
        # Independent ±1 vectors: overlap has std 1/√4096 = 0.016; 5σ bound.
        assert abs(overlap(a, b)) < 5 / 64

    def test_sum_of_items_counts_repeated_tokens(self) -> None:
        total = sum_of_items(9, "notes", "gram", ["ab", "cd", "ab"], 40)
        expected = 2 * item_vector(9, "notes", "gram", "ab", 40).astype(np.int32) + item_vector(
            9, "notes", "gram", "cd", 40
        )
        assert total.tolist() == expected.tolist()


class TestFieldSpec:
    def test_defaults_are_filled_per_kind(self) -> None:
        assert FieldSpec("site", "category").units == 128
        assert FieldSpec("notes", "text").units == 512
        assert FieldSpec("depth_m", "number", tolerance=1).units == 256
        assert FieldSpec("collected_on", "date").units == 256
        assert FieldSpec("collected_on", "date").tolerance_days == 30.0

    def test_to_dict_fills_every_option_of_the_kind(self) -> None:
        assert FieldSpec("notes", "text", units=1024).to_dict() == {
            "name": "notes",
            "kind": "text",
            "units": 1024,
            "nullable": True,
            "ngram": 3,
            "bigrams": True,
            "max_length": 256,
        }
        assert FieldSpec.from_dict(
            {"name": "collected_on", "kind": "date", "maximum": "2030-12-31"}
        ).to_dict() == {
            "name": "collected_on",
            "kind": "date",
            "units": 256,
            "nullable": True,
            "tolerance_days": 30.0,
            "minimum": None,
            "maximum": "2030-12-31",
            "clamp": False,
            "tilings": 8,
        }

    @pytest.mark.parametrize(
        ("spec", "fragment"),
        [
            ({"name": "depth_m", "kind": "number", "tolerance": -3.0}, "tolerance must be > 0"),
            ({"name": "depth_m", "kind": "number"}, "tolerance is required"),
            ({"name": "depth_m", "kind": "number", "tolerance": float("nan")}, "finite"),
            ({"name": "site", "kind": "category", "units": 100}, "multiple of 8, got 100"),
            ({"name": "site", "kind": "category", "units": 0}, "between 8 and 16384, got 0"),
            ({"name": "site", "kind": "category", "units": 16392}, "between 8 and 16384"),
            ({"name": "site", "kind": "category", "units": True}, "units must be an integer"),
            ({"name": "site", "kind": "category", "tolerence": 1}, "unknown option 'tolerence'"),
            ({"name": "site", "kind": "category", "ngram": 3}, "unknown option 'ngram'"),
            ({"name": "site", "kind": "colour"}, "kind must be one of"),
            ({"name": "notes", "kind": "text", "ngram": 6}, "ngram must be between 2 and 5"),
            ({"name": "notes", "kind": "text", "bigrams": 1}, "bigrams must be true or false"),
            ({"name": "notes", "kind": "text", "max_length": 0}, "max_length must be between"),
            (
                {"name": "depth_m", "kind": "number", "tolerance": 1, "minimum": 5, "maximum": 5},
                "minimum must be below maximum",
            ),
            (
                {"name": "depth_m", "kind": "number", "tolerance": 1, "tilings": 7},
                "tilings must divide units",
            ),
            ({"name": "collected_on", "kind": "date", "minimum": "14/06/2023"}, "ISO date"),
            ({"name": "collected_on", "kind": "date", "tolerance_days": 0}, "must be > 0"),
            ({"name": "collected_on", "kind": "date", "clamp": "yes"}, "clamp must be true"),
        ],
    )
    def test_bad_options_raise_schema_error_naming_field_and_limit(
        self, spec: dict[str, object], fragment: str
    ) -> None:
        with pytest.raises(SchemaError, match=fragment) as caught:
            FieldSpec.from_dict(spec)
        assert caught.value.field == spec["name"]
        assert f"field {spec['name']!r}" in str(caught.value)

    def test_negative_tolerance_message_reads_as_documented(self) -> None:
        with pytest.raises(SchemaError) as caught:
            FieldSpec("depth_m", "number", tolerance=-3.0)
        assert str(caught.value) == "field 'depth_m': tolerance must be > 0, got -3.0"

    @pytest.mark.parametrize("name", ["", "9lives", "_hidden", "site name", "é", "x" * 65])
    def test_names_that_are_not_identifiers_are_rejected(self, name: str) -> None:
        with pytest.raises(SchemaError, match="field name must be"):
            FieldSpec(name, "category")

    def test_an_option_of_another_kind_is_rejected_on_direct_construction(self) -> None:
        with pytest.raises(SchemaError, match="option 'tolerance' does not apply") as caught:
            FieldSpec("site", "category", tolerance=2.0)
        assert caught.value.field == "site"


class TestSchema:
    def test_round_trip_through_dicts_is_exact(self) -> None:
        schema = registry_schema(identity_units=64)
        assert Schema.from_dict(schema.to_dict()) == schema
        assert Schema.from_dict(schema.to_dict()).to_dict() == schema.to_dict()

    def test_slices_are_contiguous_in_field_order_with_identity_last(self) -> None:
        schema = registry_schema(identity_units=64)
        slices = schema.slices
        assert list(slices) == [
            "site", "species", "depth_m", "collected_on", "collector_code", IDENTITY_BLOCK,
        ]  # fmt: skip
        starts = [s.start for s in slices.values()]
        stops = [s.stop for s in slices.values()]
        assert starts == [0, *stops[:-1]]
        assert stops[-1] == schema.n_units == 128 + 512 + 256 + 256 + 128 + 64

    def test_field_looks_up_by_name(self) -> None:
        schema = registry_schema()
        assert schema.field("depth_m").tolerance == 5.0
        with pytest.raises(SchemaError, match="no field 'depth'"):
            schema.field("depth")

    def test_duplicate_field_names_are_rejected(self) -> None:
        with pytest.raises(SchemaError, match="'site' appears more than once") as caught:
            Schema.from_dict(
                {"fields": [{"name": "site", "kind": "category"}, {"name": "site", "kind": "text"}]}
            )
        assert caught.value.field == "site"

    def test_too_many_fields_are_rejected_naming_the_limit(self) -> None:
        fields = [{"name": f"f{i}", "kind": "category"} for i in range(MAX_FIELDS + 1)]
        with pytest.raises(SchemaError, match="between 1 and 64 fields, got 65"):
            Schema.from_dict({"fields": fields})

    def test_empty_schema_is_rejected(self) -> None:
        with pytest.raises(SchemaError, match="between 1 and 64 fields, got 0"):
            Schema.from_dict({"fields": []})

    @pytest.mark.parametrize("units", [-8, 12, 16392])
    def test_identity_units_must_be_a_small_multiple_of_eight(self, units: int) -> None:
        with pytest.raises(SchemaError, match="identity_units must be a multiple of 8"):
            Schema.from_dict({"fields": [{"name": "site", "kind": "category"}],
                              "identity_units": units})  # fmt: skip

    def test_unknown_top_level_keys_are_rejected(self) -> None:
        with pytest.raises(SchemaError, match="unknown schema option 'field'"):
            Schema.from_dict({"field": []})


class TestCategoryCodes:
    codec = Codec(Schema((FieldSpec("site", "category"),)), SEED)

    def test_spelling_variants_of_case_width_and_spacing_share_one_code(self) -> None:
        base = self.codec.encode_record({"site": "North Jetty"})
        for variant in ["north jetty", "  NORTH\tJetty ", "Ｎｏｒｔｈ Ｊｅｔｔｙ"]:
            assert (self.codec.encode_record({"site": variant}) == base).all()

    def test_an_integer_is_the_same_category_as_its_decimal_string(self) -> None:
        assert (
            self.codec.encode_record({"site": 7}) == self.codec.encode_record({"site": "7"})
        ).all()

    @pytest.mark.parametrize("value", [True, 7.0, b"dunes", ["dunes"]])
    def test_bools_floats_and_other_types_are_rejected(self, value: object) -> None:
        with pytest.raises(RecordError, match="'site' must be a string or an integer") as caught:
            self.codec.encode_record({"site": value})
        assert caught.value.field == "site"

    def test_an_empty_string_is_a_missing_value(self) -> None:
        assert (
            self.codec.encode_record({"site": "  "}) == self.codec.encode_record({"site": None})
        ).all()

    def test_different_values_are_nearly_orthogonal(self) -> None:
        a = self.codec.encode_record({"site": "north jetty"})
        b = self.codec.encode_record({"site": "south jetty"})
        # Category codes are independent item vectors: std 1/√128 = 0.088; 4σ bound.
        assert abs(overlap(a, b)) < 4 / math.sqrt(128)

    def test_value_over_the_length_limit_is_rejected(self) -> None:
        codec = Codec(Schema((FieldSpec("site", "category", max_length=10),)), SEED)
        with pytest.raises(RecordError, match=r"11 characters .* max_length 10") as caught:
            codec.encode_record({"site": "x" * 11})
        assert caught.value.field == "site"


class TestNullItems:
    codec = Codec(registry_schema(), SEED)

    def test_a_missing_field_is_the_null_item_not_zeros(self) -> None:
        record = {k: v for k, v in SPECIMEN.items() if k != "species"}
        pattern = self.codec.encode_record(record)
        block = pattern[self.codec.schema.slices["species"]]
        assert set(block.tolist()) == {-1, 1}
        assert (pattern == self.codec.encode_record({**record, "species": None})).all()

    def test_the_null_item_differs_from_every_value(self) -> None:
        null = self.codec.encode_record({**SPECIMEN, "site": None})
        block = self.codec.schema.slices["site"]
        for value in ["null", "none", "", "north jetty"]:
            if value == "":
                continue  # an empty string is itself a missing value
            other = self.codec.encode_record({**SPECIMEN, "site": value})
            # Independent 128-unit vectors: std 0.088; 4σ bound.
            assert abs(overlap(null[block], other[block])) < 4 / math.sqrt(128)

    def test_a_field_that_is_not_nullable_must_be_given(self) -> None:
        record = {k: v for k, v in SPECIMEN.items() if k != "collector_code"}
        with pytest.raises(RecordError, match="'collector_code' is missing") as caught:
            self.codec.encode_record(record)
        assert caught.value.field == "collector_code"

    def test_known_null_in_a_cue_is_the_null_item(self) -> None:
        cue = self.codec.encode_cue({"site": None})
        stored = self.codec.encode_record({**SPECIMEN, "site": None})
        block = self.codec.schema.slices["site"]
        assert (cue[block] == stored[block]).all()


class TestTextCodes:
    def test_a_middle_substitution_keeps_the_predicted_overlap_with_trigrams_alone(self) -> None:
        rng = np.random.default_rng(1)
        codec = text_codec(bigrams=False)
        overlaps = []
        for word in random_words(rng, 300, 8):
            typo = word[:4] + ("z" if word[4] != "z" else "y") + word[5:]
            overlaps.append(
                overlap(
                    codec.encode_record({"species": word}), codec.encode_record({"species": typo})
                )
            )
        # 8 letters padded by 2 markers a side give 10 trigrams, 7 shared: the exact sign model
        # gives 0.453 (the arcsin law alone would say 0.494; even sums tie half the time).
        # Std of the mean over 300 words ≈ 0.04/√300 = 0.002; repeated grams in a few words add
        # a little spread, hence ±0.02.
        assert sign_agreement(7, 3) == pytest.approx(0.453, abs=0.001)
        assert np.mean(overlaps) == pytest.approx(sign_agreement(7, 3), abs=0.02)
        assert 0.42 < np.mean(overlaps) < 0.5

    def test_bigrams_raise_the_overlap_after_a_middle_substitution(self) -> None:
        rng = np.random.default_rng(2)
        codec = text_codec(bigrams=True)
        overlaps = []
        for word in random_words(rng, 300, 8):
            typo = word[:4] + ("z" if word[4] != "z" else "y") + word[5:]
            overlaps.append(
                overlap(
                    codec.encode_record({"species": word}), codec.encode_record({"species": typo})
                )
            )
        # 10 trigrams + 9 bigrams, 14 shared; the gram count is odd, so there are no ties.
        assert np.mean(overlaps) == pytest.approx(sign_agreement(14, 5), abs=0.02)
        assert np.mean(overlaps) > 0.5

    def test_unrelated_words_are_nearly_orthogonal(self) -> None:
        codec = text_codec(units=512)
        # No shared letter, so no shared gram except the all-marker-free boundary pairs (none).
        a = codec.encode_record({"species": "abcdefgh"})
        b = codec.encode_record({"species": "stuvwxyz"})
        # Std 1/√512 = 0.044; 4σ bound.
        assert abs(overlap(a, b)) < 4 / math.sqrt(512)

    def test_overlap_follows_the_arcsin_law_of_the_ngram_cosine(self) -> None:
        # Source: Charikar (2002), "Similarity estimation techniques from rounding algorithms";
        # Goemans & Williamson (1995): for sign random projections, P(agree) = 1 − θ/π, so
        # E[overlap] = 1 − (2/π)·arccos(cos(u, v)).
        units = 4096
        codec = text_codec(units=units)
        rng = np.random.default_rng(3)
        letters = list("abcdefgh")  # a small alphabet makes many partial overlaps
        deviations = []
        for _ in range(200):
            word = "".join(rng.choice(letters, int(rng.integers(4, 14))))
            edited = list(word)
            for _ in range(int(rng.integers(1, 4))):
                edited[int(rng.integers(len(edited)))] = str(rng.choice(letters))
            other = "".join(edited)
            u, v = Counter(ngrams_by_hand(word)), Counter(ngrams_by_hand(other))
            cosine = sum(u[g] * v[g] for g in u) / math.sqrt(
                sum(c * c for c in u.values()) * sum(c * c for c in v.values())
            )
            predicted = 1 - (2 / math.pi) * math.acos(min(1.0, cosine))
            measured = overlap(
                codec.encode_record({"species": word}), codec.encode_record({"species": other})
            )
            deviations.append(measured - predicted)
        # Per pair the sampling std is ≤ 1/√4096 = 0.016; the law is exact for Gaussian
        # projections and our ±1 sums of 10-30 grams are only near-Gaussian, which adds a small
        # bias (measured ≈ +0.007). Bounds: 5σ per pair, 0.02 on the mean of 200 pairs.
        assert max(abs(d) for d in deviations) < 5 / math.sqrt(units)
        assert abs(float(np.mean(deviations))) < 0.02

    def test_codes_with_bigrams_have_no_ties_to_break(self) -> None:
        # With both gram sizes the count 2·len + 2n − 3 is odd, so no unit sums to 0.
        for text in ["a", "ab", "limpet", "patella vulgata"]:
            grams = ngrams_by_hand(text)
            assert len(grams) % 2 == 1
            total = sum_of_items(SEED, "species", "gram", grams, 512)
            assert (total != 0).all()

    def test_ties_are_broken_per_value_not_by_one_shared_vector(self) -> None:
        codec = text_codec(units=4096, bigrams=False)
        a, b = "abcd", "wxyz"  # 6 trigrams each: about 31 % of units tie
        sums = [
            sum_of_items(SEED, "species", "gram", ngrams_by_hand(t, bigrams=False), 4096)
            for t in (a, b)
        ]
        both_tied = (sums[0] == 0) & (sums[1] == 0)
        assert both_tied.sum() > 200
        code_a = codec.encode_record({"species": a})[both_tied]
        code_b = codec.encode_record({"species": b})[both_tied]
        # A shared tie vector would make these equal; per-value ones agree on about half.
        # Std over ≈ 390 units ≤ 1/√200 = 0.071; 4σ bound.
        assert abs(overlap(code_a, code_b)) < 4 / math.sqrt(200)

    def test_text_over_the_length_limit_is_rejected_naming_the_limit(self) -> None:
        codec = Codec(Schema((FieldSpec("species", "text", max_length=20),)), SEED)
        with pytest.raises(RecordError, match=r"'species' is 21 characters .* max_length 20"):
            codec.encode_record({"species": "a" * 21})
        with pytest.raises(RecordError, match="max_length 20") as caught:
            codec.encode_record({"species": "a" * 1000})
        assert caught.value.field == "species"

    def test_whitespace_beyond_the_limit_does_not_count(self) -> None:
        codec = Codec(Schema((FieldSpec("species", "text", max_length=5),)), SEED)
        assert codec.normalise("species", "  ab   cd  ") == "ab cd"

    def test_control_characters_become_spaces(self) -> None:
        codec = text_codec()
        assert codec.normalise("species", "patella\x00\x02vulgata") == "patella vulgata"

    def test_non_strings_are_rejected(self) -> None:
        with pytest.raises(RecordError, match="'species' must be a string, got int"):
            text_codec().encode_record({"species": 12})


def ngrams_by_hand(text: str, n: int = 3, bigrams: bool = True) -> list[str]:
    """Our own n-gram list, written independently of the codec: size s padded with s − 1 marks."""
    out = []
    for size in [n, n - 1] if bigrams else [n]:
        padded = "\x02" * (size - 1) + text + "\x02" * (size - 1)
        out += [padded[i : i + size] for i in range(len(padded) - size + 1)]
    return out


class TestNumberCodes:
    tolerance = 5.0
    codec = Codec(Schema((FieldSpec("depth_m", "number", tolerance=5.0),)), SEED)
    units = 256

    def mean_overlap_at(self, delta: float, anchors: npt.NDArray[np.float64]) -> float:
        return float(
            np.mean(
                [
                    overlap(
                        self.codec.encode_record({"depth_m": x}),
                        self.codec.encode_record({"depth_m": x + delta}),
                    )
                    for x in anchors
                ]
            )
        )

    def anchors(self, seed: int, count: int = 300) -> npt.NDArray[np.float64]:
        # Spread far apart so that different anchors share no tiles and act independently.
        return np.random.default_rng(seed).uniform(-1e5, 1e5, count)

    def test_overlap_falls_linearly_within_the_tolerance(self) -> None:
        anchors = self.anchors(4)
        for step in range(9):
            delta = self.tolerance * step / 8
            # Expected 1 − δ/tol (exact at multiples of tol/8). Noise: the differing blocks of
            # 32 units give std ≤ 1/16 per anchor, 0.0036 over 300 anchors; 0.02 ≈ 5σ.
            assert self.mean_overlap_at(delta, anchors) == pytest.approx(1 - step / 8, abs=0.02)

    def test_overlap_falls_monotonically_with_distance(self) -> None:
        anchors = self.anchors(5, count=150)
        # Between grid points the expectation is still linear because anchors are uniform.
        means = [self.mean_overlap_at(d, anchors) for d in np.linspace(0, 6.0, 13)]
        assert all(a > b for a, b in itertools.pairwise(means[:11]))

    def test_values_beyond_the_tolerance_are_nearly_orthogonal(self) -> None:
        anchors = self.anchors(6)
        for delta in [5.0, 7.5, 50.0, 5e4]:
            # No shared tile: independent vectors, std of the mean 1/√(300·256) = 0.0036; 5σ.
            assert abs(self.mean_overlap_at(delta, anchors)) < 5 / math.sqrt(300 * self.units)

    def test_codes_have_no_bias(self) -> None:
        codes = np.array(
            [self.codec.encode_record({"depth_m": x}) for x in self.anchors(7, 1000)],
            dtype=np.float64,
        )
        # Mean of 1000·256 independent ±1 values: std 1/√256000 = 0.002; 4σ bound.
        assert abs(codes.mean()) < 4 / math.sqrt(codes.size)
        # Per unit: std 1/√1000 = 0.032, max of 256 such means stays under 5σ.
        assert np.abs(codes.mean(axis=0)).max() < 5 / math.sqrt(1000)

    def test_values_far_outside_any_range_still_encode(self) -> None:
        code = self.codec.encode_record({"depth_m": -1e300})
        assert set(code.tolist()) == {-1, 1}

    @pytest.mark.parametrize(
        ("value", "fragment"),
        [
            (float("nan"), "must be a finite number, got nan"),
            (float("inf"), "must be a finite number, got inf"),
            (True, "must be a number, got bool"),
            ("12.5", "must be a number, got str"),
            (np.bool_(False), "must be a number, got bool"),
        ],
    )
    def test_bad_numbers_raise_record_error_naming_the_field(
        self, value: object, fragment: str
    ) -> None:
        with pytest.raises(RecordError, match=f"field 'depth_m' {fragment}") as caught:
            self.codec.encode_record({"depth_m": value})
        assert caught.value.field == "depth_m"

    def test_numpy_scalars_are_numbers(self) -> None:
        a = self.codec.encode_record({"depth_m": np.float32(12.5)})
        assert (a == self.codec.encode_record({"depth_m": 12.5})).all()

    def test_values_outside_the_range_are_rejected_with_the_limit(self) -> None:
        codec = Codec(registry_schema(), SEED)
        with pytest.raises(RecordError) as caught:
            codec.encode_record({**SPECIMEN, "depth_m": 812.0})
        assert str(caught.value) == "field 'depth_m' is 812.0, above the schema's maximum 500.0"
        assert caught.value.field == "depth_m"
        with pytest.raises(RecordError, match=r"-1\.0, below the schema's minimum 0\.0"):
            codec.encode_record({**SPECIMEN, "depth_m": -1})

    def test_clamped_fields_clamp_instead(self) -> None:
        spec = FieldSpec("depth_m", "number", tolerance=5.0, maximum=500.0, clamp=True)
        codec = Codec(Schema((spec,)), SEED)
        assert codec.normalise("depth_m", 812) == 500.0
        assert (
            codec.encode_record({"depth_m": 812}) == codec.encode_record({"depth_m": 500})
        ).all()


class TestDateCodes:
    codec = Codec(Schema((FieldSpec("collected_on", "date", tolerance_days=30),)), SEED)

    def test_iso_strings_and_dates_give_the_same_code(self) -> None:
        a = self.codec.encode_record({"collected_on": "2023-06-14"})
        b = self.codec.encode_record({"collected_on": datetime.date(2023, 6, 14)})
        assert (a == b).all()
        assert self.codec.normalise("collected_on", " 2023-06-14 ") == datetime.date(2023, 6, 14)

    def test_overlap_falls_linearly_in_days(self) -> None:
        rng = np.random.default_rng(8)
        starts = [datetime.date(1900, 1, 1) + datetime.timedelta(int(d)) for d in
                  rng.integers(0, 60000, 300)]  # fmt: skip
        for days, expected in [(0, 1.0), (15, 0.5), (30, 0.0), (45, 0.0)]:
            # Same model as numbers (tol = 30 days, 8 tilings): 0.02 ≈ 5σ over 300 anchors.
            mean = np.mean(
                [
                    overlap(
                        self.codec.encode_record({"collected_on": s}),
                        self.codec.encode_record(
                            {"collected_on": s + datetime.timedelta(days=days)}
                        ),
                    )
                    for s in starts
                ]
            )
            assert mean == pytest.approx(expected, abs=0.02)

    @pytest.mark.parametrize(
        "value", ["14/06/2023", "2023-13-01", "2023-02-30", "2023-W24-3", "20230614", "soon"]
    )
    def test_strings_that_are_not_iso_dates_are_rejected(self, value: str) -> None:
        with pytest.raises(RecordError, match="'collected_on' is not an ISO date") as caught:
            self.codec.encode_record({"collected_on": value})
        assert caught.value.field == "collected_on"

    def test_datetimes_and_numbers_are_rejected(self) -> None:
        for value in [datetime.datetime(2023, 6, 14, 9, 30), 738685]:
            with pytest.raises(RecordError, match="must be a date or a YYYY-MM-DD string"):
                self.codec.encode_record({"collected_on": value})

    def test_dates_before_the_minimum_are_rejected(self) -> None:
        codec = Codec(registry_schema(), SEED)
        with pytest.raises(RecordError, match="1999-12-31, below the schema's minimum 2000-01-01"):
            codec.encode_record({**SPECIMEN, "collected_on": "1999-12-31"})


class TestRecordsAndCues:
    codec = Codec(registry_schema(identity_units=64), SEED)

    def test_records_are_plus_minus_one_int8(self) -> None:
        pattern = self.codec.encode_record(SPECIMEN, key="SPC-000117")
        assert pattern.dtype == np.int8
        assert pattern.shape == (self.codec.n_units,)
        assert set(pattern.tolist()) == {-1, 1}

    def test_an_unknown_field_is_named(self) -> None:
        with pytest.raises(RecordError, match="unknown field 'tide'") as caught:
            self.codec.encode_record({**SPECIMEN, "tide": "low"}, key="k")
        assert caught.value.field == "tide"

    def test_the_identity_block_needs_a_key_and_depends_on_it(self) -> None:
        with pytest.raises(RecordError, match="needs a non-empty key"):
            self.codec.encode_record(SPECIMEN)
        block = self.codec.schema.slices[IDENTITY_BLOCK]
        a = self.codec.encode_record(SPECIMEN, key="SPC-000117")[block]
        b = self.codec.encode_record(SPECIMEN, key="SPC-000118")[block]
        # Independent 64-unit vectors: std 1/8; 4σ bound.
        assert abs(overlap(a, b)) < 0.5

    def test_a_cue_leaves_unknown_fields_and_the_identity_block_at_zero(self) -> None:
        cue = self.codec.encode_cue({"species": "Patela vulgata", "depth_m": 13})
        slices = self.codec.schema.slices
        for name in ["site", "collected_on", "collector_code", IDENTITY_BLOCK]:
            assert not cue[slices[name]].any()
        known = self.codec.known_mask(cue)
        assert known.sum() == 512 + 256
        assert set(cue[known].tolist()) == {-1, 1}

    def test_an_empty_cue_is_rejected(self) -> None:
        with pytest.raises(RecordError, match="at least one known field"):
            self.codec.encode_cue({})

    def test_batches_match_single_encodings_and_name_the_bad_row(self) -> None:
        records = [SPECIMEN, {**SPECIMEN, "site": "Kelp Bed 2"}]
        batch = self.codec.encode_records(records, keys=["a", "b"])
        assert batch.shape == (2, self.codec.n_units)
        assert (batch[1] == self.codec.encode_record(records[1], key="b")).all()
        with pytest.raises(RecordError, match="record 1: field 'depth_m'") as caught:
            self.codec.encode_records([SPECIMEN, {**SPECIMEN, "depth_m": 900}], keys=["a", "b"])
        assert caught.value.field == "depth_m"
        with pytest.raises(ParameterError, match="2 records but 1 keys"):
            self.codec.encode_records(records, keys=["a"])

    def test_cue_batches_match_single_cues(self) -> None:
        cues: list[dict[str, object]] = [{"site": "North Jetty"}, {"depth_m": 40, "species": None}]
        batch = self.codec.encode_cues(cues)
        assert (batch[1] == self.codec.encode_cue(cues[1])).all()
        with pytest.raises(RecordError, match="cue 0: unknown field 'sight'"):
            self.codec.encode_cues([{"sight": "x"}])


class TestDeterminism:
    def test_two_codecs_with_one_seed_agree(self) -> None:
        a = Codec(registry_schema(), 99).encode_record(SPECIMEN)
        b = Codec(Schema.from_dict(registry_schema().to_dict()), 99).encode_record(SPECIMEN)
        assert (a == b).all()

    def test_different_seeds_give_nearly_orthogonal_patterns(self) -> None:
        a = Codec(registry_schema(), 1).encode_record(SPECIMEN)
        b = Codec(registry_schema(), 2).encode_record(SPECIMEN)
        # Independent 1280-unit patterns: std 0.028; 4σ bound.
        assert abs(overlap(a, b)) < 4 / math.sqrt(a.size)


class TestDecoding:
    codec = Codec(registry_schema(), SEED)
    candidates: ClassVar[dict[str, list[Any]]] = {
        "site": ["North Jetty", "South Jetty", "Kelp Bed 2", None],
        "species": ["Patella vulgata", "Patella depressa", "Littorina littorea", None],
        "depth_m": [2.5, 10.0, 12.5, 15.0, 40.0],
        "collected_on": ["2023-06-14", "2023-05-01", "2022-06-14", None],
        "collector_code": ["RW-07", "RW-01", "JM-07"],
    }

    def test_every_field_of_a_stored_pattern_decodes_exactly(self) -> None:
        pattern = self.codec.encode_record(SPECIMEN)
        for name, options in self.candidates.items():
            matches = self.codec.decode_field(pattern, name, options)
            assert matches[0].value == SPECIMEN[name]
            assert matches[0].overlap == 1.0
            units = self.codec.schema.field(name).n_units
            assert matches[0].z == pytest.approx(math.sqrt(units))
            assert [m.overlap for m in matches] == sorted(
                (m.overlap for m in matches), reverse=True
            )

    def test_a_field_left_out_of_the_cue_is_read_back_from_the_nearest_pattern(self) -> None:
        stored = {
            "Kelp Bed 2": {**SPECIMEN, "site": "Kelp Bed 2"},
            "South Jetty": {**SPECIMEN, "site": "South Jetty", "species": "Patella depressa"},
            "North Jetty": {**SPECIMEN, "species": "Littorina littorea", "depth_m": 40.0},
        }
        patterns = {site: self.codec.encode_record(record) for site, record in stored.items()}
        cue = self.codec.encode_cue({"species": "Patela vulgata", "depth_m": 13.0})
        assert not cue[self.codec.schema.slices["site"]].any()
        nearest = max(patterns, key=lambda site: overlap(patterns[site], cue))
        best = self.codec.decode_field(patterns[nearest], "site", self.candidates["site"])[0]
        assert best == FieldMatch("Kelp Bed 2", 1.0, math.sqrt(128))

    def test_a_noisy_state_still_decodes_to_the_true_value(self) -> None:
        rng = np.random.default_rng(9)
        state = self.codec.encode_record(SPECIMEN).astype(np.int64)
        flips = rng.random(state.size) < 0.2
        state[flips] *= -1
        for name, options in self.candidates.items():
            # 20 % flips keep the true overlap near 0.6 while wrong values stay near 0 or at
            # their code similarity (0.5 for 12.5 vs 10 or 15): the truth still wins.
            assert self.codec.decode_field(state, name, options)[0].value == SPECIMEN[name]

    def test_no_candidates_give_no_matches(self) -> None:
        assert self.codec.decode_field(self.codec.encode_record(SPECIMEN), "site", []) == []

    def test_states_of_the_wrong_shape_or_with_nan_are_rejected(self) -> None:
        with pytest.raises(ShapeError, match=r"shape \(1280,\)"):
            self.codec.decode_field(np.ones(10), "site", ["x"])
        state = np.ones(self.codec.n_units)
        state[3] = np.nan
        with pytest.raises(StateValueError, match="NaN"):
            self.codec.decode_field(state, "site", ["x"])

    def test_value_grid_builds_candidates_for_numbers_and_dates(self) -> None:
        assert self.codec.value_grid("depth_m", 0, 20, 5) == [0.0, 5.0, 10.0, 15.0, 20.0]
        days = self.codec.value_grid("collected_on", "2023-06-01", "2023-06-03", 5)
        assert days == [datetime.date(2023, 6, d) for d in (1, 2, 3)]
        grid = self.codec.value_grid("depth_m", 0, 40, 81)
        best = self.codec.decode_field(self.codec.encode_record(SPECIMEN), "depth_m", grid)[0]
        assert best.value == 12.5

    def test_value_grid_rejects_bad_requests(self) -> None:
        with pytest.raises(ParameterError, match="'site' is a category field"):
            self.codec.value_grid("site", 0, 1, 2)
        with pytest.raises(ParameterError, match="n must be an integer between 1 and 100000"):
            self.codec.value_grid("depth_m", 0, 1, 0)
        with pytest.raises(ParameterError, match="lo must not be above hi"):
            self.codec.value_grid("depth_m", 5, 1, 3)
        with pytest.raises(RecordError, match=r"above the schema's maximum 500\.0"):
            self.codec.value_grid("depth_m", 0, 900, 3)

    def test_field_overlaps_skip_fields_unknown_in_the_cue(self) -> None:
        pattern = self.codec.encode_record(SPECIMEN)
        cue = self.codec.encode_cue({"species": "Patela vulgata", "depth_m": 12.5})
        overlaps = self.codec.field_overlaps(pattern, cue)
        assert list(overlaps) == ["species", "depth_m"]
        assert overlaps["depth_m"] == 1.0
        assert 0.6 < overlaps["species"] < 1.0
