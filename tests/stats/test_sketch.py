"""Sketch construction, algebra and serialisation."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from plumbwatch.stats import grid
from plumbwatch.stats.sketch import FIELDS, Sketch, merge_bins


def rows(min_size: int = 0, max_size: int = 60) -> st.SearchStrategy[tuple[list[int], list[float]]]:
    probs = st.one_of(st.floats(0.0, 1.0), st.sampled_from([0.0, 1.0, 0.3, 0.9, 1e-7]))
    return st.integers(min_size, max_size).flatmap(
        lambda n: st.tuples(
            st.lists(st.integers(0, 1), min_size=n, max_size=n),
            st.lists(probs, min_size=n, max_size=n),
        )
    )


def sk(r: tuple[list[int], list[float]]) -> Sketch:
    return Sketch.from_arrays(np.array(r[0], dtype=np.int64), np.array(r[1], dtype=np.float64))


def test_fields_and_totals(simulate) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(1000, 3)
    s = Sketch.from_arrays(y, p)
    assert s.n == 1000 and s.events == y.sum() and not s.is_empty
    assert Sketch.empty().is_empty and Sketch.empty().n == 0
    pc = np.clip(p, np.finfo(float).eps, 1 - np.finfo(float).eps)
    assert s.total("sum_log_loss") == pytest.approx(
        -np.sum(y * np.log(pc) + (1 - y) * np.log(1 - pc)), rel=1e-12
    )
    assert s.total("sum_spiegelhalter_var") == pytest.approx(
        np.sum((1 - 2 * p) ** 2 * p * (1 - p)), rel=1e-12
    )
    assert s.total("sum_logit") == pytest.approx(grid.clipped_logit(p).sum(), rel=1e-12)
    for name in FIELDS:
        assert getattr(s, name).shape == (grid.N_BINS,)


def test_sketch_logit_sums_are_bitwise_those_of_clipped_logit(simulate) -> None:  # type: ignore[no-untyped-def]
    _, p = simulate(2000, 4, sd=6.0)
    p = np.concatenate([p, [0.0, 1.0, 1e-9, 1 - 1e-9, 1e-6, 1 - 1e-6]])
    for x in p:
        s = Sketch.from_arrays([0], [x])
        assert s.sum_logit[grid.bin_index([x])[0]] == grid.clipped_logit(np.array([x]))[0]


def test_falsified_counts() -> None:
    s = Sketch.from_arrays([1, 0, 1, 0, 1], [0.0, 1.0, 1.0, 0.0, 0.5])
    assert s.total("falsified") == 2


def test_weights_equal_repetition(simulate) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(300, 5)
    w = np.random.default_rng(5).integers(0, 4, 300)
    a = Sketch.from_arrays(y, p, sample_weight=w)
    b = Sketch.from_arrays(np.repeat(y, w), np.repeat(p, w))
    assert a.allclose(b, rtol=1e-12)


def test_grouped_equals_separate(simulate) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(5000, 6)
    g = np.random.default_rng(6).integers(0, 7, 5000)
    many = Sketch.from_arrays_grouped(y, p, g, 7)
    for k in range(7):
        assert many[k].allclose(Sketch.from_arrays(y[g == k], p[g == k]), rtol=1e-12)
    assert Sketch.sum(many).allclose(Sketch.from_arrays(y, p), rtol=1e-12)


def test_by_group_equals_grouped_bit_for_bit(simulate) -> None:  # type: ignore[no-untyped-def]
    # Each (group, bin) cell adds its rows in row order in both builders, so the
    # sparse one must give exactly the dense one's sums, and leave out empty groups.
    y, p = simulate(5000, 9)
    p[:3] = [0.0, 1.0, 0.3]  # a falsified row and an equal-width edge
    g = np.random.default_rng(9).choice([0, 2, 5, 11], 5000)
    w = np.random.default_rng(10).random(5000)
    for weights in (None, w):
        dense = Sketch.from_arrays_grouped(y, p, g, 12, sample_weight=weights)
        sparse = Sketch.from_arrays_by_group(y, p, g, sample_weight=weights)
        assert sorted(sparse) == [0, 2, 5, 11]
        for k, s in sparse.items():
            assert s == dense[k]
    assert Sketch.from_arrays_by_group([], [], np.zeros(0, np.int64)) == {}
    with pytest.raises(ValueError, match="group_ids"):
        Sketch.from_arrays_by_group([0, 1], [0.1, 0.2], [0, -1])
    with pytest.raises(ValueError, match="group_ids"):
        Sketch.from_arrays_by_group([0, 1], [0.1, 0.2], [0.0, 1.0])


def test_sketch_fields_are_read_only_views(simulate) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(200, 11)
    for s in (Sketch.from_arrays(y, p), Sketch.from_arrays(y, p) + Sketch.empty()):
        with pytest.raises(ValueError, match="read-only"):
            s.count[0] = 1.0
    built = Sketch(**{name: np.ones(grid.N_BINS) for name in FIELDS})
    assert (built + built).count[0] == 2.0


@pytest.mark.parametrize(
    ("y", "p", "match"),
    [
        ([0, 1], [0.5], "same length"),
        ([0, 2], [0.5, 0.5], "y_true"),
        ([0, 1], [0.5, np.nan], "y_prob"),
        ([0, 1], [0.5, 1.5], "y_prob"),
        ([[0, 1]], [[0.5, 0.5]], "1-D"),
    ],
)
def test_bad_input(y: object, p: object, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        Sketch.from_arrays(y, p)  # type: ignore[arg-type]


def test_bad_groups() -> None:
    with pytest.raises(ValueError, match="group_ids"):
        Sketch.from_arrays_grouped([0, 1], [0.1, 0.2], [0, 3], 2)


def test_subtract_more_than_held_raises() -> None:
    a = Sketch.from_arrays([1], [0.2])
    with pytest.raises(ValueError, match="other"):
        _ = a - Sketch.from_arrays([1, 1], [0.2, 0.2])


def test_serialised_size_beats_raw_rows(simulate) -> None:  # type: ignore[no-untyped-def]
    # DESIGN.md "Storage": buckets of >= 1,000 rows must be smaller than the raw
    # rows; a raw prediction row with id, timestamps and outcome is ~100 bytes.
    for n in (1000, 10_000):
        y, p = simulate(n, 7)
        blob = Sketch.from_arrays(y, p).to_bytes()
        assert len(blob) < 100 * n
    assert len(Sketch.empty().to_bytes()) < 40


def test_compressed_and_plain_forms_decode_alike(simulate) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(3000, 12)
    for s in (Sketch.from_arrays(y, p), Sketch.from_arrays(y, p, sample_weight=np.full(3000, 0.5))):
        plain, packed = s.to_bytes(), s.to_bytes(compress=True)
        assert packed[1] & 1 and not plain[1] & 1
        assert Sketch.from_bytes(plain) == s and Sketch.from_bytes(packed) == s
    blob = Sketch.from_arrays(y, p).to_bytes()
    with pytest.raises(ValueError, match="bytes"):
        Sketch.from_bytes(blob[:-1])
    with pytest.raises(ValueError, match="bytes"):
        Sketch.from_bytes(blob[:5])


def test_from_bytes_rejects_garbage() -> None:
    with pytest.raises(ValueError, match="version"):
        Sketch.from_bytes(b"\x07\x00")
    with pytest.raises(ValueError, match="version"):
        Sketch.from_bytes(b"")


def test_weighted_round_trip(simulate) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(100, 8)
    s = Sketch.from_arrays(y, p, sample_weight=np.linspace(0.1, 2, 100))
    assert Sketch.from_bytes(s.to_bytes()) == s


@settings(deadline=None, max_examples=60)
@given(rows(), rows(), rows())
def test_merge_associative_and_commutative(r1, r2, r3) -> None:  # type: ignore[no-untyped-def]
    a, b, c = sk(r1), sk(r2), sk(r3)
    assert ((a + b) + c).allclose(a + (b + c), rtol=1e-12)
    assert (a + b).allclose(b + a, rtol=1e-12)
    both = (np.array(r1[0] + r2[0], dtype=np.int64), np.array(r1[1] + r2[1]))
    assert (a + b).allclose(Sketch.from_arrays(*both), rtol=1e-12)


@settings(deadline=None, max_examples=60)
@given(rows(), rows())
def test_subtract_after_add(r1, r2) -> None:  # type: ignore[no-untyped-def]
    a, b = sk(r1), sk(r2)
    back = (a + b) - b
    assert back.allclose(a, rtol=1e-9, atol=1e-9)
    assert np.all(back.count >= 0)
    assert ((a + b) - (a + b)).is_empty


@settings(deadline=None, max_examples=60)
@given(rows())
def test_bytes_round_trip(r) -> None:  # type: ignore[no-untyped-def]
    s = sk(r)
    assert Sketch.from_bytes(s.to_bytes()) == s


@settings(deadline=None, max_examples=60)
@given(rows(), rows())
def test_column_form_gives_the_dense_results_exactly(r1, r2) -> None:  # type: ignore[no-untyped-def]
    # Decoded sketches hold their occupied bins only; every operation must give
    # bit for bit what the dense form gives.
    a, b = sk(r1), sk(r2)
    ca, cb = Sketch.from_bytes(a.to_bytes()), Sketch.from_bytes(b.to_bytes())
    assert ca._is_columns() and not a._is_columns()
    both = a + b
    for x, y in ((ca, cb), (a, cb), (ca, b)):
        assert x + y == both
        assert (x + y).to_bytes() == both.to_bytes()
    assert (ca + cb) - cb == both - b
    assert ((ca + cb) - cb).to_bytes() == (both - b).to_bytes()
    assert Sketch.sum([ca, b, cb]) == (a + b) + b
    assert ca + Sketch.from_bytes(a.to_bytes()) == a + a  # no new bins
    for name in FIELDS:
        assert ca.total(name) == a.total(name)
    assert (ca.n, ca.events, ca.is_empty) == (a.n, a.events, a.is_empty)
    if b.n:
        with pytest.raises(ValueError, match="other"):
            _ = ca - (ca + cb)
    assert ca == a and np.array_equal(ca.count, a.count)
    assert (Sketch.empty() + ca) == a and Sketch.empty().to_bytes() == Sketch.sum([]).to_bytes()


@settings(deadline=None, max_examples=60)
@given(rows(), rows(), rows())
def test_replace_bins_rebuilds_an_updated_sketch(r1, r2, r3) -> None:  # type: ignore[no-untyped-def]
    # A stored sketch, then the new values of the bins an update changed (empty
    # bins included), give the updated sketch bit for bit.
    base, add, sub = sk(r1), sk(r2), sk(r3)
    stored = Sketch.from_bytes((base + sub).to_bytes())
    updated = (stored + add) - sub
    changed = np.union1d(Sketch.from_bytes(add.to_bytes())._columns()[0], sub._columns()[0])
    patch = Sketch.from_bytes(updated.to_bytes(bins=changed))
    assert patch._columns()[0].tolist() == changed.tolist()
    rebuilt = stored.replace_bins(patch)
    assert rebuilt == updated and rebuilt.to_bytes() == updated.to_bytes()
    assert Sketch.from_bytes(base.to_bytes()).replace_bins(Sketch.empty()) == base


def test_bins_argument_is_checked() -> None:
    s = Sketch.from_arrays([1, 0], [0.2, 0.7])
    with pytest.raises(ValueError, match="bins"):
        s.to_bytes(bins=[3, 2])
    with pytest.raises(ValueError, match="bins"):
        s.to_bytes(bins=[grid.N_BINS])


@settings(deadline=None, max_examples=60)
@given(
    st.lists(st.integers(0, grid.N_BINS - 1), max_size=40),
    st.lists(st.integers(0, grid.N_BINS - 1), max_size=40),
)
def test_merge_bins_is_the_sorted_union(a: list[int], b: list[int]) -> None:
    # Reference: numpy's union1d.
    x, y = np.unique(np.array(a, np.intp)), np.unique(np.array(b, np.intp))
    assert merge_bins(x, y).tolist() == np.union1d(x, y).tolist()


@pytest.mark.parametrize("width", [1, 5, 7])
def test_grouped_fields_equal_numpy_sums_of_the_dense_fields(width: int) -> None:
    # Sketch.grouped reads only occupied bins; numpy's reshape-and-sum of the dense
    # fields (padded to whole runs) is the reference, for a sparse and a dense sketch.
    rng = np.random.default_rng(3)
    p = rng.beta(2, 5, 500)
    y = (rng.random(500) < p).astype(float)
    sparse = Sketch.from_bytes(Sketch.from_arrays(y, p).to_bytes())
    names = ("count", "sum_y", "sum_logit")
    size = -(-grid.N_BINS // width)
    for sketch in (sparse, Sketch.from_arrays(y, p)):
        got = sketch.grouped(names, width)
        for row, name in zip(got, names, strict=True):
            padded = np.zeros(size * width)
            padded[: grid.N_BINS] = getattr(sketch, name)
            np.testing.assert_allclose(row, padded.reshape(size, width).sum(axis=1), rtol=1e-12)
    with pytest.raises(ValueError, match="width"):
        sparse.grouped(names, 0)
