"""Mergeable per-bin sums over the probability grid.

A :class:`Sketch` summarises any number of ``(y, p)`` rows as per-bin sums on
:data:`plumbwatch.stats.grid.GRID_EDGES`. Sketches add (merge cohorts or
slices) and subtract (apply corrections). Sums of per-row terms keep log loss,
Brier, equal-width ECE (10 and 15 bins), Spiegelhalter's Z and O/E exact; rank
and quantile statistics are computed on the grid with documented bounds.

Per-bin fields (all float64, length ``N_BINS``; with ``sample_weight`` every
term is multiplied by the row weight):

=========================  ======================================================
``count``                  number of rows (sum of weights)
``sum_y``                  events
``sum_p``                  Σ p
``sum_p2``                 Σ p²
``sum_log_loss``           Σ −[y ln q + (1−y) ln(1−q)], q = clip(p, eps, 1−eps),
                           eps = float64 machine epsilon (as scikit-learn does)
``sum_brier``              Σ (p − y)²
``sum_spiegelhalter_num``  Σ (y − p)(1 − 2p)
``sum_spiegelhalter_var``  Σ (1 − 2p)² p(1 − p)
``sum_logit``              Σ z, z = logit(clip(p, 1e-6, 1 − 1e-6))
``sum_y_logit``            Σ y z
``falsified``              rows with p = 0 and y = 1, or p = 1 and y = 0
=========================  ======================================================

Serialised form (:meth:`Sketch.to_bytes`), all little-endian: one version byte
(1), one flag byte (bit 0: body is zlib-compressed; bit 1: ``count``,
``sum_y`` and ``falsified`` stored as uint32), then the body: uint32 grid
fingerprint, uint16 number of fields, uint32 number ``m`` of stored bins,
``m`` uint16 bin indices, then each field's ``m`` values in the order above.
Only bins with a nonzero field are stored. Compression is off by default: on
the float sums it saves about a quarter of the bytes but costs ten times the
encoding time, and an evaluation run re-encodes every bucket it touches.

In memory the eleven fields are rows of one read-only ``(11, N_BINS)`` matrix
(the attributes are views of it), so merging is one array addition.
"""

from __future__ import annotations

import struct
import zlib
from collections.abc import Iterable
from dataclasses import dataclass, fields
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from plumbwatch.stats import grid
from plumbwatch.stats._validate import check_binary_pair, check_positive_int

FloatArray = NDArray[np.float64]

FIELDS = (
    "count",
    "sum_y",
    "sum_p",
    "sum_p2",
    "sum_log_loss",
    "sum_brier",
    "sum_spiegelhalter_num",
    "sum_spiegelhalter_var",
    "sum_logit",
    "sum_y_logit",
    "falsified",
)
# Fields that can never be negative; subtraction clears float residue in them.
_NONNEGATIVE = (
    "count",
    "sum_y",
    "sum_p",
    "sum_p2",
    "sum_log_loss",
    "sum_brier",
    "sum_spiegelhalter_var",
    "falsified",
)
_INTEGRAL = ("count", "sum_y", "falsified")
_INTEGRAL_ROWS = [FIELDS.index(name) for name in _INTEGRAL]
_HEAD = struct.Struct("<IHI")  # grid fingerprint, number of fields, stored bins
# Flat cell index of (field, bin) in an (11, N_BINS) matrix: field offset + bin.
_FIELD_OFFSETS = (np.arange(len(FIELDS)) * grid.N_BINS)[:, None]
_ALL_CELLS = np.arange(len(FIELDS) * grid.N_BINS)
_FORMAT_VERSION = 1
_CHUNK = 1 << 18
_EPS = float(np.finfo(np.float64).eps)


def merge_bins(*bins: NDArray[np.intp]) -> NDArray[np.intp]:
    """Ascending unique union of bin-index arrays (``np.union1d`` without its
    generic overhead, which dominates for the few hundred bins of a bucket)."""
    merged = np.concatenate(bins)
    if merged.size < 2:
        return merged.astype(np.intp, copy=False)
    merged.sort()
    keep = np.empty(merged.size, dtype=bool)
    keep[0] = True
    np.not_equal(merged[1:], merged[:-1], out=keep[1:])
    out: NDArray[np.intp] = merged[keep]
    return out


def _row_terms(y: FloatArray, p: FloatArray) -> list[FloatArray]:
    """Per-row terms for every field but ``count``, in FIELDS order."""
    # Written with in-place operations: the logs dominate and every avoided
    # temporary is a pass over memory (the build target is >= 5M rows/s).
    pc = np.clip(p, _EPS, 1.0 - _EPS)
    lp = np.log(pc)
    np.subtract(1.0, pc, out=pc)
    l1p = np.log(pc, out=pc)
    # Clipping the logs reproduces grid.clipped_logit bit for bit, saving two logs.
    z = np.clip(lp, *grid.LOG_P_BOUNDS)
    z -= np.clip(l1p, *grid.LOG_1MP_BOUNDS)
    lp -= l1p
    lp *= y
    lp += l1p
    log_loss = np.negative(lp, out=lp)
    p2 = p * p
    r = y - p
    one_m2p = 1.0 - 2.0 * p
    brier = r * r
    r *= one_m2p
    one_m2p *= one_m2p
    one_m2p *= p - p2
    if (p == 0.0).any() or (p == 1.0).any():
        falsified = (((p == 0.0) & (y == 1.0)) | ((p == 1.0) & (y == 0.0))).astype(np.float64)
    else:
        falsified = np.zeros(0)
    return [y, p, p2, log_loss, brier, r, one_m2p, z, y * z, falsified]


@dataclass(frozen=True, eq=False)
class Sketch:
    """Per-bin sums of one set of binary predictions; see the module docstring."""

    count: FloatArray
    sum_y: FloatArray
    sum_p: FloatArray
    sum_p2: FloatArray
    sum_log_loss: FloatArray
    sum_brier: FloatArray
    sum_spiegelhalter_num: FloatArray
    sum_spiegelhalter_var: FloatArray
    sum_logit: FloatArray
    sum_y_logit: FloatArray
    falsified: FloatArray

    def __post_init__(self) -> None:
        for f in fields(self):
            a = getattr(self, f.name)
            if not isinstance(a, np.ndarray) or a.shape != (grid.N_BINS,):
                raise ValueError(
                    f"{f.name}: expected a float64 array of length {grid.N_BINS}, "
                    f"got {getattr(a, 'shape', type(a).__name__)}"
                )
            if a.dtype != np.float64:
                a = a.astype(np.float64)
                object.__setattr__(self, f.name, a)
            # Sketches are shared between merges; a stray in-place edit would corrupt all.
            a.setflags(write=False)

    # -- construction -------------------------------------------------------

    @classmethod
    def _from_matrix(cls, m: FloatArray) -> Sketch:
        """A sketch whose fields are the rows of ``m`` (float64, (11, N_BINS); taken over)."""
        if m.shape != (len(FIELDS), grid.N_BINS) or m.dtype != np.float64:
            raise ValueError(
                f"m: expected a float64 array of shape {(len(FIELDS), grid.N_BINS)}, "
                f"got {m.dtype} {m.shape}"
            )
        # Sketches are shared between merges; a stray in-place edit would corrupt all.
        m.setflags(write=False)
        self = cls.__new__(cls)
        self.__dict__.update(zip(FIELDS, m, strict=True))
        self.__dict__["_m"] = m
        return self

    @classmethod
    def _from_columns(cls, idx: NDArray[np.intp], vals: FloatArray) -> Sketch:
        """A sketch held as its occupied bins only: ascending unique bin indices
        ``idx`` and the fields there, ``vals`` of shape (11, len(idx)) (taken over).

        The dense fields are built on first use. Loading, updating and storing the
        thousands of day buckets of a run stays in this form: their dense matrices
        would be ten times the memory, and fresh memory is slow to touch."""
        idx.setflags(write=False)
        vals.setflags(write=False)
        self = cls.__new__(cls)
        self.__dict__["_cols"] = (idx, vals)
        return self

    def __getattr__(self, name: str) -> Any:
        # Reached only for attributes missing from the instance: the fields of a
        # sketch still in column form.
        if name in FIELDS and "_cols" in self.__dict__:
            self._matrix()
            return self.__dict__[name]
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {name!r}")

    def _matrix(self) -> FloatArray:
        """The fields as one read-only (11, N_BINS) matrix (kept after the first call)."""
        m: FloatArray | None = self.__dict__.get("_m")
        if m is None:
            columns = self.__dict__.get("_cols")
            if columns is not None:
                m = np.zeros((len(FIELDS), grid.N_BINS))
                m[:, columns[0]] = columns[1]
            else:
                m = np.stack([getattr(self, name) for name in FIELDS])
            m.setflags(write=False)
            self.__dict__.update(zip(FIELDS, m, strict=True))
            self.__dict__["_m"] = m
        return m

    def _columns(self) -> tuple[NDArray[np.intp], FloatArray]:
        """Occupied bins and the fields there (see :meth:`_from_columns`)."""
        columns: tuple[NDArray[np.intp], FloatArray] | None = self.__dict__.get("_cols")
        if columns is None:
            m = self._matrix()
            idx = np.flatnonzero(m.any(axis=0))
            return idx, m[:, idx]
        return columns

    def _at(self, idx: NDArray[np.intp]) -> FloatArray:
        """The fields at bins ``idx`` (ascending, a superset of the occupied bins if
        this sketch is in column form), as a new (11, len(idx)) array."""
        m: FloatArray | None = self.__dict__.get("_m")
        if m is not None:
            out: FloatArray = m[:, idx]
            return out
        own, vals = self.__dict__["_cols"]
        out = np.zeros((len(FIELDS), idx.size))
        out[:, np.searchsorted(idx, own)] = vals
        return out

    def _values_at(self, bins: NDArray[np.intp]) -> FloatArray:
        """The fields at any ascending unique ``bins`` (zeros where empty): (11, len(bins))."""
        m: FloatArray | None = self.__dict__.get("_m")
        if m is not None:
            out: FloatArray = m[:, bins]
            return out
        own, vals = self.__dict__["_cols"]
        out = np.zeros((len(FIELDS), bins.size))
        if own.size and bins.size:
            pos = np.minimum(np.searchsorted(own, bins), own.size - 1)
            hit = own[pos] == bins
            out[:, hit] = vals[:, pos[hit]]
        return out

    def grouped(self, names: tuple[str, ...], width: int) -> FloatArray:
        """The fields ``names`` summed over runs of ``width`` consecutive grid bins:
        shape ``(len(names), ceil(N_BINS / width))``. Reads only occupied bins, so a
        sparse sketch is not expanded to its dense fields."""
        if width < 1:
            raise ValueError(f"width: expected a positive integer, got {width!r}")
        rows = [FIELDS.index(name) for name in names]
        size = -(-grid.N_BINS // width)
        idx, vals = self._columns()
        out = np.zeros((len(rows), size))
        for i, row in enumerate(rows):
            out[i] = np.bincount(idx // width, weights=vals[row], minlength=size)
        return out

    def _is_columns(self) -> bool:
        return "_m" not in self.__dict__ and "_cols" in self.__dict__

    @classmethod
    def empty(cls) -> Sketch:
        """A sketch of no rows."""
        return cls._from_columns(np.zeros(0, np.intp), np.zeros((len(FIELDS), 0)))

    @classmethod
    def from_arrays(
        cls,
        y_true: ArrayLike,
        y_prob: ArrayLike,
        *,
        sample_weight: ArrayLike | None = None,
    ) -> Sketch:
        """Summarise rows ``(y_true[i], y_prob[i])``, optionally weighted."""
        return cls.from_arrays_grouped(
            y_true,
            y_prob,
            np.zeros(len(np.asarray(y_true)), dtype=np.intp),
            1,
            sample_weight=sample_weight,
        )[0]

    @classmethod
    def from_arrays_grouped(
        cls,
        y_true: ArrayLike,
        y_prob: ArrayLike,
        group_ids: ArrayLike,
        n_groups: int,
        *,
        sample_weight: ArrayLike | None = None,
    ) -> list[Sketch]:
        """One sketch per group, built in a single pass.

        ``group_ids[i]`` in ``range(n_groups)`` names the group of row ``i``
        (e.g. slice × day); each field is one ``np.bincount`` over
        ``group * N_BINS + bin``.
        """
        y, p, w = check_binary_pair(y_true, y_prob, sample_weight)
        n_groups = check_positive_int(n_groups, "n_groups")
        g = np.asarray(group_ids)
        if g.shape != y.shape or g.dtype.kind not in "iu":
            raise ValueError(
                f"group_ids: expected integers of length {y.shape[0]}, "
                f"got shape {g.shape} dtype {g.dtype}"
            )
        if g.size and (g.min() < 0 or g.max() >= n_groups):
            raise ValueError(f"group_ids: expected values in [0, {n_groups}), got others")
        size = n_groups * grid.N_BINS
        out = np.zeros((len(FIELDS), size))
        # Chunks keep the dozen per-row temporaries in cache: one pass over 10M
        # rows at once is about twice as slow as the same rows in 256k pieces.
        # (Chunks grow with the output so that each bincount's output allocation
        # stays small next to its input.)
        chunk = max(_CHUNK, 8 * size)
        for start in range(0, y.size, chunk):
            stop = start + chunk
            yc, pc = y[start:stop], p[start:stop]
            wc = None if w is None else w[start:stop]
            terms = _row_terms(yc, pc)
            key = grid.bin_index(pc, z=terms[7])
            if n_groups > 1:
                key = key + g[start:stop].astype(np.intp) * grid.N_BINS
            out[0] += np.bincount(key, weights=wc, minlength=size)
            for i, t in enumerate(terms, start=1):
                if t.size:  # an empty falsified term: no p is exactly 0 or 1
                    out[i] += np.bincount(key, weights=t if wc is None else t * wc, minlength=size)
        cube = out.reshape(len(FIELDS), n_groups, grid.N_BINS)
        return [cls._from_matrix(np.ascontiguousarray(cube[:, k])) for k in range(n_groups)]

    @classmethod
    def from_arrays_by_group(
        cls,
        y_true: ArrayLike,
        y_prob: ArrayLike,
        group_ids: ArrayLike,
        *,
        sample_weight: ArrayLike | None = None,
    ) -> dict[int, Sketch]:
        """One sketch per group id that has rows: ``{group: sketch}``.

        For many sparsely filled groups (the buckets an evaluation run touches):
        the sums are those of :meth:`from_arrays_grouped`, each (group, bin) cell
        adding its rows in row order, but the work space is the occupied cells,
        not groups × bins (10,000 rows over 3,000 groups fill about 40,000 cells
        of 4 million).
        """
        y, p, w = check_binary_pair(y_true, y_prob, sample_weight)
        g = np.asarray(group_ids)
        if g.shape != y.shape or g.dtype.kind not in "iu":
            raise ValueError(
                f"group_ids: expected integers of length {y.shape[0]}, "
                f"got shape {g.shape} dtype {g.dtype}"
            )
        if not y.size:
            return {}
        if g.min() < 0:
            raise ValueError("group_ids: expected values >= 0, got a negative one")
        cells, inv = np.unique(
            g.astype(np.intp) * grid.N_BINS + grid.bin_index(p), return_inverse=True
        )
        k = cells.size
        out = np.zeros((len(FIELDS), k))
        for start in range(0, y.size, _CHUNK):
            stop = start + _CHUNK
            ic = inv[start:stop]
            wc = None if w is None else w[start:stop]
            out[0] += np.bincount(ic, weights=wc, minlength=k)
            for i, t in enumerate(_row_terms(y[start:stop], p[start:stop]), start=1):
                if t.size:  # an empty falsified term: no p is exactly 0 or 1
                    out[i] += np.bincount(ic, weights=t if wc is None else t * wc, minlength=k)
        group = cells // grid.N_BINS
        bins = cells - group * grid.N_BINS
        cuts = (np.flatnonzero(np.diff(group)) + 1).tolist()
        result: dict[int, Sketch] = {}
        for a, b in zip([0, *cuts], [*cuts, k], strict=True):
            result[int(group[a])] = cls._from_columns(bins[a:b], out[:, a:b].copy())
        return result

    # -- algebra ------------------------------------------------------------

    def __add__(self, other: object) -> Sketch:
        if not isinstance(other, Sketch):
            return NotImplemented
        # Bin by bin the same additions whatever the forms: a bin held by one
        # side only keeps its value (x + 0 == x).
        if self._is_columns() and other._is_columns():
            (a_idx, a_vals), (b_idx, b_vals) = self._columns(), other._columns()
            pos = np.searchsorted(a_idx, b_idx)
            if pos.size and pos[-1] < a_idx.size and np.array_equal(a_idx[pos], b_idx):
                # The usual update of a day bucket: no new bins.
                idx, out = a_idx, a_vals.copy()
            else:
                idx = merge_bins(a_idx, b_idx)
                out = self._at(idx)
                pos = np.searchsorted(idx, b_idx)
            out[:, pos] += b_vals
            return Sketch._from_columns(idx, out)
        if other._is_columns():
            dense, sparse = self, other
        elif self._is_columns():
            dense, sparse = other, self
        else:
            return Sketch._from_matrix(self._matrix() + other._matrix())
        total = dense._matrix().copy()
        idx, vals = sparse._columns()
        total[:, idx] += vals
        return Sketch._from_matrix(total)

    def __sub__(self, other: object) -> Sketch:
        """Remove rows summarised in ``other`` (a correction).

        Float residue is cleaned: a bin whose count falls to within 1e-9 of
        zero (relative to ``self``) is emptied, and tiny negative values of
        non-negative fields become 0. Removing more than ``self`` holds
        raises ``ValueError``.
        """
        if not isinstance(other, Sketch):
            return NotImplemented
        columns = self._is_columns() and other._is_columns()
        if columns:
            # Only bins held by either side can change; the rest stay empty.
            idx = merge_bins(self._columns()[0], other._columns()[0])
            a, b = self._at(idx), other._at(idx)
        else:
            a, b = self._matrix(), other._matrix()
        d = a - b
        tol = 1e-9 * np.maximum(1.0, np.abs(a))
        for name in _NONNEGATIVE:
            i = FIELDS.index(name)
            if (d[i] < -tol[i]).any():
                raise ValueError(f"other: removes more {name} than the sketch holds")
            d[i][d[i] < 0.0] = 0.0
        gone = d[0] <= tol[0]
        d[:, gone] = 0.0
        if columns:
            kept = d.any(axis=0)
            return Sketch._from_columns(idx[kept], np.ascontiguousarray(d[:, kept]))
        return Sketch._from_matrix(d)

    @staticmethod
    def sum(sketches: Iterable[Sketch]) -> Sketch:
        """Merge any number of sketches (an empty iterable gives the empty sketch).

        Each bin adds its values in the order given, as repeated ``+`` would. Dense
        sketches add whole; each run of sketches in column form is one
        ``np.bincount`` over their occupied (field, bin) cells, after the total so
        far, which sums each output cell in input order.
        """
        size = len(FIELDS) * grid.N_BINS
        total: FloatArray = np.zeros(size)
        keys: list[NDArray[np.intp]] = []
        weights: list[FloatArray] = []

        def add_pending() -> FloatArray:
            summed: FloatArray = np.bincount(
                np.concatenate([_ALL_CELLS, *keys]), np.concatenate([total, *weights]), size
            ).astype(np.float64, copy=False)
            keys.clear()
            weights.clear()
            return summed

        for s in sketches:
            if s._is_columns():
                idx, vals = s._columns()
                keys.append((_FIELD_OFFSETS + idx).ravel())
                weights.append(vals.ravel())
            else:
                if keys:
                    total = add_pending()
                total += s._matrix().ravel()
        if keys:
            total = add_pending()
        return Sketch._from_matrix(total.reshape(len(FIELDS), grid.N_BINS))

    def held_bins(self) -> NDArray[np.intp]:
        """Ascending indices of the bins this sketch holds: the occupied ones, plus
        any empty bins a decoded patch carries (see ``to_bytes(bins=...)``)."""
        return self._columns()[0]

    def replace_bins(self, other: Sketch) -> Sketch:
        """This sketch with every bin that ``other`` holds taken from ``other``.

        ``other`` is read in column form, empty columns included (as
        :meth:`to_bytes` with ``bins`` writes them): a stored bucket plus the later
        values of the bins a run changed make the current bucket, bit for bit.
        """
        if not isinstance(other, Sketch):
            raise TypeError(f"other: expected a Sketch, got {type(other).__name__}")
        new_idx, new_vals = other._columns()
        idx, vals = self._columns()
        if idx.size and new_idx.size:
            pos = np.searchsorted(idx, new_idx)
            if (
                pos[-1] < idx.size
                and np.array_equal(idx[pos], new_idx)
                and new_vals.any(axis=0).all()
            ):
                # The usual patch: bins the sketch holds, none of them emptied.
                out = vals.copy()
                out[:, pos] = new_vals
                return Sketch._from_columns(idx, out)
        both = merge_bins(idx, new_idx)
        out = np.zeros((len(FIELDS), both.size))
        out[:, np.searchsorted(both, idx)] = vals
        out[:, np.searchsorted(both, new_idx)] = new_vals  # the later values win
        occupied = out.any(axis=0)
        if occupied.all():
            return Sketch._from_columns(both, out)
        return Sketch._from_columns(both[occupied], np.ascontiguousarray(out[:, occupied]))

    # -- totals -------------------------------------------------------------

    def _field(self, name: str) -> FloatArray:
        """One field over all bins, without keeping a dense copy of a sketch in column
        form (totals then add the same values in the same order either way)."""
        if self._is_columns():
            idx, vals = self._columns()
            row = np.zeros(grid.N_BINS)
            row[idx] = vals[FIELDS.index(name)]
            return row
        out: FloatArray = getattr(self, name)
        return out

    @property
    def n(self) -> float:
        """Total rows (sum of weights)."""
        return float(self._field("count").sum())

    @property
    def events(self) -> float:
        """Total events (weighted)."""
        return float(self._field("sum_y").sum())

    @property
    def is_empty(self) -> bool:
        return not bool(self._field("count").any())

    def total(self, name: str) -> float:
        """Sum over bins of field ``name``."""
        if name not in FIELDS:
            raise ValueError(f"name: expected one of {FIELDS}, got {name!r}")
        return float(self._field(name).sum())

    def coarse_sums(self, n_bins: int) -> dict[str, FloatArray]:
        """Every field summed into ``n_bins`` equal-width bins (10 or 15), exactly."""
        mapping = grid.coarse_map(n_bins)
        # The map is nondecreasing, so each coarse bin is a run of grid bins.
        starts = np.searchsorted(mapping, np.arange(n_bins), side="left")
        sums = np.add.reduceat(self._matrix(), starts, axis=1)
        return {name: sums[i] for i, name in enumerate(FIELDS)}

    # -- comparison ---------------------------------------------------------

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Sketch):
            return NotImplemented
        return bool(np.array_equal(self._matrix(), other._matrix()))

    __hash__ = None  # type: ignore[assignment]

    def allclose(self, other: Sketch, rtol: float = 1e-9, atol: float = 1e-9) -> bool:
        """Field-wise ``np.allclose`` (for merged or round-tripped sketches)."""
        return bool(np.allclose(self._matrix(), other._matrix(), rtol=rtol, atol=atol))

    # -- serialisation ------------------------------------------------------

    def to_bytes(self, *, compress: bool = False, bins: ArrayLike | None = None) -> bytes:
        """Compact binary form; see the module docstring for the layout.

        ``compress=True`` zlib-compresses the body when that makes it smaller.
        ``bins`` (ascending bin indices) stores exactly those bins, empty ones
        included: the changed bins of a bucket, for :meth:`replace_bins`.
        """
        if bins is None:
            idx, sub = self._columns()
            kept = sub.any(axis=0)
            if not kept.all():
                idx, sub = idx[kept], sub[:, kept]
        else:
            idx = np.asarray(bins, dtype=np.intp)
            if idx.ndim != 1 or (idx.size and (idx[0] < 0 or idx[-1] >= grid.N_BINS)):
                raise ValueError(f"bins: expected bin indices in [0, {grid.N_BINS}), got others")
            if (idx[1:] <= idx[:-1]).any():
                raise ValueError("bins: expected ascending unique bin indices, got others")
            sub = self._values_at(idx)
        ints = sub[_INTEGRAL_ROWS]
        integral = bool(
            idx.size == 0
            or (np.array_equal(ints, np.round(ints)) and ints.min() >= 0 and ints.max() < 2**32)
        )
        head = _HEAD.pack(grid.grid_fingerprint(), len(FIELDS), idx.size)
        parts = [head, idx.astype("<u2").tobytes()]
        if integral:
            # FIELDS order: count, sum_y (uint32), eight float sums, falsified (uint32).
            parts += [
                sub[:2].astype("<u4").tobytes(),
                sub[2:-1].astype("<f8").tobytes(),
                sub[-1].astype("<u4").tobytes(),
            ]
        else:
            parts.append(sub.astype("<f8").tobytes())
        body = b"".join(parts)
        flags = 2 if integral else 0
        if compress:
            packed = zlib.compress(body, 6)
            if len(packed) < len(body):
                body, flags = packed, flags | 1
        return bytes([_FORMAT_VERSION, flags]) + body

    @classmethod
    def from_bytes(cls, data: bytes) -> Sketch:
        """Inverse of :meth:`to_bytes`; rejects other versions and other grids."""
        if len(data) < 2 or data[0] != _FORMAT_VERSION:
            got = data[0] if data else None
            raise ValueError(f"data: expected sketch format version {_FORMAT_VERSION}, got {got}")
        flags = data[1]
        # The body starts at byte 2 of ``data``, or at 0 of its decompressed form.
        body, start = (zlib.decompress(data[2:]), 0) if flags & 1 else (data, 2)
        head = _HEAD.size
        if len(body) - start < head:
            raise ValueError(f"data: expected at least {head + 2} bytes, got {len(data)}")
        fingerprint, n_fields, m = _HEAD.unpack_from(body, start)
        if fingerprint != grid.grid_fingerprint() or n_fields != len(FIELDS):
            raise ValueError("data: expected a sketch built on this grid, got another grid")
        expected = head + m * (2 + (4 * 3 + 8 * 8 if flags & 2 else 8 * len(FIELDS)))
        if len(body) - start != expected:
            raise ValueError(f"data: expected {expected} body bytes, got {len(body) - start}")
        pos = start + head
        idx = np.frombuffer(body, "<u2", m, pos).astype(np.intp)
        if m and (idx[-1] >= grid.N_BINS or (idx[1:] <= idx[:-1]).any()):
            raise ValueError(f"data: expected ascending bin indices below {grid.N_BINS}")
        pos += 2 * m
        if flags & 2:
            vals = np.empty((len(FIELDS), m))
            vals[:2] = np.frombuffer(body, "<u4", 2 * m, pos).reshape(2, m)
            vals[2:-1] = np.frombuffer(body, "<f8", 8 * m, pos + 8 * m).reshape(8, m)
            vals[-1] = np.frombuffer(body, "<u4", m, pos + 72 * m)
        else:
            vals = np.frombuffer(body, "<f8", len(FIELDS) * m, pos).reshape(-1, m).copy()
        return cls._from_columns(idx, vals)
