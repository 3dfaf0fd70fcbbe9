"""Measurement records: construction, files (text, npz, npy), round trips and bad input."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

import jax

from psiloom.tomography import MeasurementRecord, load_record, rotate_vector, rotated_log_amplitudes, shot_tables
from psiloom.tomography.rotations import OVERLAPS


def _record(seed=0, n_shots=30, n_sites=5):
    rng = np.random.default_rng(seed)
    outcomes = rng.choice([-1, 1], size=(n_shots, n_sites))
    bases = rng.integers(0, 3, size=(n_shots, n_sites))
    return MeasurementRecord.from_arrays(outcomes, bases)


def test_text_and_npz_hold_the_same_shots(tmp_path):
    rec = _record()
    rec.save(tmp_path / "shots.txt")
    rec.save(tmp_path / "shots.npz")
    a, b = load_record(tmp_path / "shots.txt"), load_record(tmp_path / "shots.npz")
    assert a.same_as(b) and a.same_as(rec)
    assert a.basis_strings() == rec.basis_strings()


def test_text_written_by_hand_with_bits_and_plus_minus_one(tmp_path):
    path = tmp_path / "hand.txt"
    path.write_text("# a comment\nZZXY 0110\n\nzxyz +1 -1 1 -1\n")
    rec = load_record(path)
    np.testing.assert_array_equal(rec.outcomes, [[1, -1, -1, 1], [1, -1, 1, -1]])
    assert rec.basis_strings() == ["ZZXY", "ZXYZ"]
    assert rec.max_rotated_sites() == 2


def test_npy_outcomes_with_bases_and_bits(tmp_path):
    bits = np.array([[0, 1, 1], [1, 0, 0]], np.uint8)
    np.save(tmp_path / "b.npy", bits)
    rec = load_record(tmp_path / "b.npy", bases="XZZ", bits=True)
    np.testing.assert_array_equal(rec.outcomes, 1 - 2 * bits.astype(int))
    np.testing.assert_array_equal(rec.bits(), bits)
    assert rec.basis_counts() == {"XZZ": 2}
    z = MeasurementRecord.from_arrays(1 - 2 * bits.astype(int))
    z.save(tmp_path / "z.npy")
    assert load_record(tmp_path / "z.npy").same_as(z)
    with pytest.raises(ValueError, match="non-Z bases"):
        rec.save(tmp_path / "x.npy")


@settings(max_examples=20)
@given(hnp.arrays(np.int8, hnp.array_shapes(min_dims=2, max_dims=2, min_side=1, max_side=6),
                  elements=st.sampled_from([-1, 1])),
       st.data())
def test_round_trip_through_every_format(tmp_path_factory, outcomes, data):
    bases = data.draw(hnp.arrays(np.uint8, outcomes.shape, elements=st.integers(0, 2)))
    rec = MeasurementRecord.from_arrays(outcomes, bases)
    folder = tmp_path_factory.mktemp("rt")
    for name in ("r.txt", "r.npz"):
        rec.save(folder / name)
        assert load_record(folder / name).same_as(rec)


@pytest.mark.parametrize("text, message", [
    ("ZZ 01\nZZZ 011\n", "ragged"),
    ("ZQ 01\n", "unknown letter"),
    ("ZZZ 01\n", "hold 2"),
    ("ZZ +1 2\n", "neither a bit string"),
    ("ZZ\n", "expected a basis string and outcomes"),
    ("# only a comment\n", "no shots"),
])
def test_bad_text_names_the_line(tmp_path, text, message):
    path = tmp_path / "bad.txt"
    path.write_text(text)
    with pytest.raises(ValueError, match=message):
        load_record(path)


def test_bad_arrays():
    with pytest.raises(ValueError, match="different lengths"):
        MeasurementRecord.from_arrays([[1, -1, 1], [1, -1]])
    with pytest.raises(ValueError, match="at least one shot"):
        MeasurementRecord.from_arrays(np.zeros((0, 3)))
    with pytest.raises(ValueError, match="bits=True"):
        MeasurementRecord.from_arrays([[0, 1]])
    with pytest.raises(ValueError, match="0 or 1"):
        MeasurementRecord.from_arrays([[2, 1]], bits=True)
    with pytest.raises(ValueError, match="shape"):
        MeasurementRecord.from_arrays([1, -1, 1])
    with pytest.raises(ValueError, match="names 2 sites"):
        MeasurementRecord.from_arrays([[1, -1, 1]], "ZZ")
    with pytest.raises(ValueError, match="unknown letter"):
        MeasurementRecord.from_arrays([[1, -1]], ["ZW"])
    with pytest.raises(ValueError, match="2 basis strings for 1 shots"):
        MeasurementRecord.from_arrays([[1, -1]], ["ZZ", "XX"])
    with pytest.raises(ValueError, match="basis code"):
        MeasurementRecord.from_arrays([[1, -1]], np.array([[0, 3]]))
    with pytest.raises(TypeError):
        MeasurementRecord.from_arrays([["a", "b"]])


@pytest.mark.parametrize("fraction", [0, 1, -0.2, 1.5, float("nan")])
def test_held_out_fraction_outside_the_open_interval_is_refused(fraction):
    with pytest.raises(ValueError, match="held_out_fraction"):
        _record().split(fraction, jax.random.PRNGKey(0))


def test_split_is_a_partition():
    rec = _record(n_shots=40)
    train, held = rec.split(0.25, jax.random.PRNGKey(1))
    assert (train.n_shots, held.n_shots) == (30, 10)
    both = np.concatenate([train.outcomes, held.outcomes])
    assert sorted(map(tuple, both.tolist())) == sorted(map(tuple, rec.outcomes.tolist()))


def test_overlaps_are_the_eigenvectors_of_the_pauli_matrices():
    # rows: ⟨s|_b in the (↑, ↓) basis; σ^b |s⟩_b = s |s⟩_b (textbook Pauli matrices)
    paulis = [np.diag([1.0, -1.0]), np.array([[0, 1], [1, 0]]), np.array([[0, -1j], [1j, 0]])]
    for code, sigma in enumerate(paulis):
        u = OVERLAPS[code]
        np.testing.assert_allclose(u @ u.conj().T, np.eye(2), atol=1e-15)
        for row, s in zip(u, (1, -1)):
            ket = row.conj()
            np.testing.assert_allclose(sigma @ ket, s * ket, atol=1e-15)


def test_rotated_vector_keeps_its_norm_and_matches_a_dense_rotation():
    rng = np.random.default_rng(3)
    v = rng.normal(size=8) + 1j * rng.normal(size=8)
    w = rotate_vector(v, "XZY")
    assert np.isclose(np.linalg.norm(w), np.linalg.norm(v))
    # dense: tensor product of per-site matrices in the configuration order (↑ = index 0 here)
    flip = lambda m: m[::-1, ::-1]  # configuration order has ↓ before ↑
    dense = np.kron(np.kron(flip(OVERLAPS[1]), np.eye(2)), flip(OVERLAPS[2]))
    np.testing.assert_allclose(w, dense @ v, atol=1e-12)


_ROT_MODEL = None


def _rotation_model():
    global _ROT_MODEL
    if _ROT_MODEL is None:
        import psiloom as pl

        model = pl.states.RBM(alpha=1, complex_params=True, init_scale=0.5)
        configs = pl.spaces.SpinSpace(3).configurations()
        variables = model.init(jax.random.PRNGKey(0), configs[:1])
        f = lambda x: model.apply(variables, x)  # noqa: E731
        rotated = jax.jit(lambda o, s, w: rotated_log_amplitudes(f, o, s, w))
        _ROT_MODEL = (f, rotated, configs)
    return _ROT_MODEL


@settings(max_examples=12)
@given(st.text(alphabet="ZXY", min_size=3, max_size=3))
def test_per_shot_rotated_amplitudes_match_the_rotated_vector(bases):
    # the 2^k-term sum per shot against the tensor-product rotation of the whole vector
    f, rotated, configs = _rotation_model()
    v = np.exp(np.asarray(f(configs)))
    # padded to 3 rotated slots whatever the basis: one compiled program, and the padding is tested
    tables = shot_tables(MeasurementRecord.from_arrays(configs, bases), n_rotated=3)
    got = np.exp(np.asarray(rotated(tables.outcomes, tables.sites, tables.factors)))
    np.testing.assert_allclose(got, rotate_vector(v, bases), atol=1e-12)
