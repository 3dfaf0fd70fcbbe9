"""Measurement records: single-shot outcomes with the local basis each site was measured in.

A record of ``S`` shots on ``N`` sites holds two ``(S, N)`` arrays:

* ``outcomes``: the measured eigenvalue ``s_i = ±1`` of the Pauli matrix σ^{b_i} at site i;
* ``bases``: the letter ``b_i ∈ {Z, X, Y}`` of that Pauli matrix, stored as the codes
  ``0 = Z, 1 = X, 2 = Y`` (:data:`BASIS_LETTERS`).

A shot in the all-Z basis is a configuration of :class:`psiloom.spaces.SpinSpace`
(``s_i = +1``: spin up). Outcomes may also be given as bits, with the convention of quantum
computing: bit 0 is the eigenvalue +1 (|0⟩ = |↑⟩), bit 1 the eigenvalue −1, ``s = 1 − 2·bit``.

Files (:meth:`MeasurementRecord.save`, :func:`load_record`; the format follows the extension):

* ``.npz``: arrays ``outcomes`` (int8, ±1) and ``bases`` (one string of N letters per shot);
* ``.npy``: the outcomes alone (all shots in the bases given to :func:`load_record`, Z by default);
* anything else is text, one shot per line: the basis string, a space, the outcome bits, e.g.
  ``ZZXY 0110``; the outcomes may instead be written as ±1 numbers (``ZZXY +1 -1 -1 +1``).
  Blank lines and lines starting with ``#`` are skipped.

Bad input (ragged lines, unknown basis letters, wrong numbers of sites, values other than ±1 or
0/1, no shots) raises ``ValueError`` naming the line or value.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import jax
import numpy as np

from psiloom._validation import ArgumentTypeError, boolean

#: Basis letters in the order of their codes (Z = 0, X = 1, Y = 2).
BASIS_LETTERS = "ZXY"
_CODE = {letter: code for code, letter in enumerate(BASIS_LETTERS)}

__all__ = ["BASIS_LETTERS", "MeasurementRecord", "load_record", "basis_codes", "basis_string"]


def basis_codes(bases, n_sites: int | None = None) -> np.ndarray:
    """Codes ``(n,)`` of one basis string such as ``"ZZXY"`` (lower case accepted)."""
    if not isinstance(bases, str):
        raise ArgumentTypeError(f"a basis must be a string of the letters Z, X, Y, got {bases!r}")
    letters = bases.strip().upper()
    bad = sorted({c for c in letters if c not in _CODE})
    if bad:
        raise ValueError(f"basis {bases!r} holds unknown letter(s) {', '.join(map(repr, bad))}; expected Z, X or Y")
    if not letters:
        raise ValueError("a basis string needs at least one letter")
    if n_sites is not None and len(letters) != n_sites:
        raise ValueError(f"basis {bases!r} names {len(letters)} sites, expected {n_sites}")
    return np.array([_CODE[c] for c in letters], dtype=np.uint8)


def basis_string(codes) -> str:
    """The letters of a row of basis codes, e.g. ``[0, 0, 1, 2] → "ZZXY"``."""
    return "".join(BASIS_LETTERS[int(c)] for c in np.asarray(codes).reshape(-1))


def _outcome_array(outcomes, bits: bool) -> np.ndarray:
    try:
        arr = np.asarray(outcomes)
    except ValueError as err:  # ragged nested sequences
        lengths = sorted({len(row) for row in outcomes}) if hasattr(outcomes, "__iter__") else "?"
        raise ValueError(f"shots of different lengths {lengths}: every shot needs one outcome per site") from err
    if arr.dtype == object or not (np.issubdtype(arr.dtype, np.number) or arr.dtype == bool):
        raise ArgumentTypeError(f"outcomes must be a numeric array, got dtype {arr.dtype}")
    if arr.ndim != 2:
        raise ValueError(f"outcomes must have shape (n_shots, n_sites), got {arr.shape}")
    if arr.shape[0] == 0:
        raise ValueError("a measurement record needs at least one shot, got zero")
    if arr.shape[1] == 0:
        raise ValueError("a measurement record needs at least one site, got zero")
    if np.iscomplexobj(arr):
        raise ArgumentTypeError(f"outcomes must be real, got dtype {arr.dtype}")
    if bits:
        ok = (arr == 0) | (arr == 1)
        if not np.all(ok):
            bad = arr[~ok].reshape(-1)[0]
            raise ValueError(f"bit outcomes must be 0 or 1, got {bad!r}")
        return (1 - 2 * arr.astype(np.int8)).astype(np.int8)
    ok = (arr == 1) | (arr == -1)
    if not np.all(ok):
        bad = arr[~ok].reshape(-1)[0]
        hint = " (pass bits=True for 0/1 outcomes)" if np.all((arr == 0) | (arr == 1) | (arr == -1)) else ""
        raise ValueError(f"outcomes must be +1 or -1, got {bad!r}{hint}")
    return arr.astype(np.int8)


def _basis_array(bases, n_shots: int, n_sites: int) -> np.ndarray:
    if bases is None:
        return np.zeros((n_shots, n_sites), np.uint8)
    if isinstance(bases, str):
        return np.broadcast_to(basis_codes(bases, n_sites), (n_shots, n_sites)).copy()
    arr = np.asarray(bases)
    if arr.ndim == 1 and (arr.dtype.kind in "US" or arr.dtype == object):
        if arr.shape[0] != n_shots:
            raise ValueError(f"{arr.shape[0]} basis strings for {n_shots} shots")
        out = np.empty((n_shots, n_sites), np.uint8)
        for k, b in enumerate(arr.tolist()):
            if isinstance(b, bytes):
                b = b.decode()
            try:
                out[k] = basis_codes(b, n_sites)
            except ValueError as err:
                raise type(err)(f"shot {k}: {err}") from err
        return out
    if arr.ndim != 2 or arr.shape != (n_shots, n_sites):
        raise ValueError(f"bases must be a string, one string per shot, or an array of shape "
                         f"{(n_shots, n_sites)}, got shape {arr.shape}")
    if arr.dtype.kind in "US":
        joined = ["".join(row) for row in arr.astype(str).tolist()]
        return _basis_array(np.array(joined), n_shots, n_sites)
    if not np.issubdtype(arr.dtype, np.integer):
        raise ArgumentTypeError(f"basis codes must be integers 0 (Z), 1 (X), 2 (Y), got dtype {arr.dtype}")
    if np.any((arr < 0) | (arr > 2)):
        bad = arr[(arr < 0) | (arr > 2)].reshape(-1)[0]
        raise ValueError(f"basis code {bad!r} is not 0 (Z), 1 (X) or 2 (Y)")
    return arr.astype(np.uint8)


@dataclass(frozen=True, eq=False)
class MeasurementRecord:
    """Shots ``outcomes`` (S, N) of ±1 measured in the local ``bases`` (S, N) of codes 0/1/2.

    Build it with :meth:`from_arrays` (which accepts ±1 or bits and basis strings); the
    constructor itself checks shapes and values and stores read-only int8/uint8 copies.
    """

    outcomes: np.ndarray
    bases: np.ndarray

    def __post_init__(self):
        out = _outcome_array(self.outcomes, bits=False)
        codes = _basis_array(self.bases, *out.shape)
        out = np.array(out, copy=True)
        codes = np.array(codes, copy=True)
        out.flags.writeable = False
        codes.flags.writeable = False
        object.__setattr__(self, "outcomes", out)
        object.__setattr__(self, "bases", codes)

    @classmethod
    def from_arrays(cls, outcomes, bases=None, bits: bool = False) -> "MeasurementRecord":
        """A record from outcomes (±1, or 0/1 with ``bits=True``) and bases.

        ``bases``: ``None`` (every site in Z), one basis string for all shots (``"ZZXZ"``), one
        string per shot, an ``(S, N)`` array of letters, or an ``(S, N)`` array of codes 0/1/2.
        """
        bits = boolean("bits", bits)
        out = _outcome_array(outcomes, bits)
        return cls(out, _basis_array(bases, *out.shape))

    # ------------------------------------------------------------------ views
    @property
    def n_shots(self) -> int:
        return int(self.outcomes.shape[0])

    @property
    def n_sites(self) -> int:
        return int(self.outcomes.shape[1])

    def __len__(self) -> int:
        return self.n_shots

    def __repr__(self) -> str:
        return f"MeasurementRecord({self.n_shots} shots, {self.n_sites} sites, {len(self.basis_counts())} bases)"

    def basis_strings(self) -> list[str]:
        """The basis of every shot as a string of letters."""
        return ["".join(BASIS_LETTERS[c] for c in row) for row in self.bases.tolist()]

    def basis_counts(self) -> dict[str, int]:
        """Number of shots per distinct basis string."""
        uniq, counts = np.unique(self.bases, axis=0, return_counts=True)
        return {basis_string(u): int(c) for u, c in zip(uniq, counts)}

    def bits(self) -> np.ndarray:
        """Outcomes as bits (0 for +1, 1 for −1), uint8."""
        return ((1 - self.outcomes) // 2).astype(np.uint8)

    def max_rotated_sites(self) -> int:
        """The largest number of non-Z sites in one shot (bounds the cost of its likelihood)."""
        return int(np.max(np.sum(self.bases != 0, axis=1)))

    def same_as(self, other: "MeasurementRecord") -> bool:
        """Whether two records hold the same shots in the same order."""
        return (isinstance(other, MeasurementRecord) and np.array_equal(self.outcomes, other.outcomes)
                and np.array_equal(self.bases, other.bases))

    def subset(self, indices) -> "MeasurementRecord":
        """The shots at ``indices`` (any NumPy index), as a new record."""
        return MeasurementRecord(self.outcomes[indices], self.bases[indices])

    def concatenate(self, other: "MeasurementRecord") -> "MeasurementRecord":
        """This record's shots followed by ``other``'s (same number of sites)."""
        if not isinstance(other, MeasurementRecord):
            raise ArgumentTypeError(f"can only join another MeasurementRecord, got {type(other).__name__}")
        if other.n_sites != self.n_sites:
            raise ValueError(f"records of {self.n_sites} and {other.n_sites} sites cannot be joined")
        return MeasurementRecord(np.concatenate([self.outcomes, other.outcomes]),
                                 np.concatenate([self.bases, other.bases]))

    def split(self, held_out_fraction: float, key: jax.Array) -> tuple["MeasurementRecord", "MeasurementRecord"]:
        """``(training, held_out)``: a random ``held_out_fraction`` ∈ (0, 1) of the shots held out
        (at least one shot in each part)."""
        from psiloom._validation import finite_real

        fraction = finite_real("held_out_fraction", held_out_fraction)
        if not 0.0 < fraction < 1.0:
            raise ValueError(f"held_out_fraction must lie in (0, 1), got {held_out_fraction!r}")
        if self.n_shots < 2:
            raise ValueError(f"cannot hold out shots from a record of {self.n_shots} shot")
        n_out = min(max(1, int(round(fraction * self.n_shots))), self.n_shots - 1)
        order = np.asarray(jax.random.permutation(key, self.n_shots))
        return self.subset(np.sort(order[n_out:])), self.subset(np.sort(order[:n_out]))

    # ------------------------------------------------------------------ files
    def save(self, path) -> None:
        """Write ``.npz``, ``.npy`` (outcomes only: refused unless every shot is all-Z) or text
        (any other extension); see the module docstring."""
        path = os.fspath(path)
        ext = os.path.splitext(path)[1].lower()
        if ext == ".npz":
            with open(path, "wb") as f:
                np.savez(f, outcomes=self.outcomes, bases=np.array(self.basis_strings()))
        elif ext == ".npy":
            if np.any(self.bases != 0):
                raise ValueError(f"a .npy file holds outcomes only, but the record has non-Z bases; "
                                 f"save {path!r} as .npz or text instead")
            with open(path, "wb") as f:
                np.save(f, self.outcomes)
        else:
            bits = self.bits()
            lines = ["# basis outcome-bits (bit 0: eigenvalue +1, bit 1: eigenvalue -1)"]
            lines += [f"{b} {''.join(map(str, row))}" for b, row in zip(self.basis_strings(), bits.tolist())]
            with open(path, "w") as f:
                f.write("\n".join(lines) + "\n")


def _parse_text(path: str) -> MeasurementRecord:
    bases, outcomes = [], []
    width = None
    with open(path) as f:
        for number, raw in enumerate(f, start=1):
            line = raw.strip()
            if not line or line.startswith("#"):
                continue
            tokens = line.split()
            if len(tokens) < 2:
                raise ValueError(f"{path}, line {number}: expected a basis string and outcomes, got {line!r}")
            try:
                codes = basis_codes(tokens[0])
            except ValueError as err:
                raise ValueError(f"{path}, line {number}: {err}") from None
            if len(tokens) == 2 and set(tokens[1]) <= {"0", "1"} and len(tokens[1]) == len(codes):
                values = [1 - 2 * int(c) for c in tokens[1]]
            elif len(tokens) == 2 and set(tokens[1]) <= {"0", "1"}:
                raise ValueError(f"{path}, line {number}: basis {tokens[0]!r} names {len(codes)} sites "
                                 f"but the outcome bits {tokens[1]!r} hold {len(tokens[1])}")
            else:
                values = []
                for tok in tokens[1:]:
                    if tok not in ("1", "+1", "-1"):
                        raise ValueError(f"{path}, line {number}: outcome {tok!r} is neither a bit string "
                                         "nor ±1")
                    values.append(int(tok))
                if len(values) != len(codes):
                    raise ValueError(f"{path}, line {number}: basis {tokens[0]!r} names {len(codes)} sites "
                                     f"but the line holds {len(values)} outcomes")
            if width is None:
                width = len(codes)
            elif len(codes) != width:
                raise ValueError(f"{path}, line {number}: {len(codes)} sites, earlier lines have {width} "
                                 "(ragged lines)")
            bases.append(codes)
            outcomes.append(values)
    if not outcomes:
        raise ValueError(f"{path} holds no shots")
    return MeasurementRecord(np.array(outcomes, np.int8), np.array(bases, np.uint8))


def load_record(path, bases=None, bits: bool = False) -> MeasurementRecord:
    """Read a record written by :meth:`MeasurementRecord.save` or by other tools.

    Args:
        path: ``.npz`` (arrays ``outcomes`` and ``bases``: basis strings, letters or codes),
            ``.npy`` (outcomes only) or text (module docstring).
        bases: for ``.npy`` files, the bases of the shots (as in
            :meth:`MeasurementRecord.from_arrays`; default all Z). Refused for other formats,
            which carry their own.
        bits: array outcomes are 0/1 bits rather than ±1 (text files say so themselves).
    """
    path = os.fspath(path)
    bits = boolean("bits", bits)
    ext = os.path.splitext(path)[1].lower()
    if ext == ".npy":
        arr = np.load(path, allow_pickle=False)
        return MeasurementRecord.from_arrays(arr, bases, bits=bits)
    if bases is not None:
        raise ValueError(f"bases= is only for .npy files (outcomes only); {path!r} carries its own bases")
    if ext == ".npz":
        with np.load(path, allow_pickle=False) as data:
            missing = {"outcomes", "bases"} - set(data.files)
            if missing:
                raise ValueError(f"{path} lacks the array(s) {sorted(missing)} (has {sorted(data.files)})")
            outcomes, raw_bases = data["outcomes"], data["bases"]
        return MeasurementRecord.from_arrays(outcomes, raw_bases, bits=bits)
    return _parse_text(path)
