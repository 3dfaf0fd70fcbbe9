"""Molecule descriptions: units, electron counts, validation, walker placement."""

import jax
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from psiloom import electrons as el


def test_angstrom_conversion_uses_codata():
    # CODATA 2018 (from memory): a0 = 0.529177210903 Å, so 0.74 Å = 1.398397332 bohr.
    h2 = el.molecule([("H", (0, 0, 0)), ("H", (0, 0, 0.74))], units="angstrom")
    assert h2.positions[1, 2] == pytest.approx(0.74 / 0.529177210903, rel=1e-12)
    assert el.BOHR_PER_ANGSTROM == pytest.approx(1.8897261246, rel=1e-10)


@pytest.mark.parametrize("symbol, n_up, n_down", [("H", 1, 0), ("He", 1, 1), ("Li", 2, 1), ("Be", 2, 2), ("B", 3, 2)])
def test_default_spin_is_lowest(symbol, n_up, n_down):
    a = el.atom(symbol)
    assert (a.n_up, a.n_down) == (n_up, n_down)
    assert a.charge == 0


def test_charge_and_spin_options():
    li_cation = el.atom("Li", charge=1)
    assert (li_cation.n_up, li_cation.n_down) == (1, 1)
    o2 = el.molecule([("O", (0, 0, 0)), ("O", (0, 0, 2.28))], spin=2)  # triplet O2
    assert (o2.n_up, o2.n_down) == (9, 7)
    direct = el.molecule([(3, (0, 0, 0))], n_up=3, n_down=0)
    assert direct.spin == 3


def test_nuclear_repulsion_lih():
    # V_NN = Z_Li Z_H / R = 3 / 3.015 hartree (Coulomb's law in atomic units).
    lih = el.molecule([("Li", (0, 0, 0)), ("H", (3.015, 0, 0))])
    assert lih.nuclear_repulsion() == pytest.approx(3 / 3.015, rel=1e-14)
    assert lih.describe()["atoms"] == [["Li", [0.0, 0.0, 0.0]], ["H", [3.015, 0.0, 0.0]]]


@pytest.mark.parametrize("kwargs, match", [
    (dict(atoms=[(-1.0, (0, 0, 0))], n_up=1, n_down=0), "positive"),
    (dict(atoms=[("He", (0, 0, 0))], spin=1), "spin 1 is impossible"),
    (dict(atoms=[("He", (0, 0, 0))], spin=4), "impossible"),
    (dict(atoms=[("H", (0, 0, 0)), ("H", (0, 0, 0))]), "coincide"),
    (dict(atoms=[("Xx", (0, 0, 0))]), "unknown element"),
    (dict(atoms=[("H", (0, 0, 0))], units="nm"), "units"),
    (dict(atoms=[("H", (0, 0, 0))], charge=1), "leaves 0 electrons"),
    (dict(atoms=[("H", (0, 0))]), "3 components"),
    (dict(atoms=[]), "at least one nucleus"),
    (dict(atoms=[("H", (0, 0, 0))], n_up=1), "both n_up and n_down"),
])
def test_invalid_systems_raise(kwargs, match):
    with pytest.raises(ValueError, match=match):
        el.molecule(**kwargs)


def test_negative_electron_count_raises():
    with pytest.raises(ValueError, match="n_down"):
        el.Molecule(np.array([1.0]), np.zeros((1, 3)), 1, -1)


@given(st.lists(st.integers(1, 10), min_size=1, max_size=4), st.integers(-2, 2), st.integers(0, 4))
def test_electron_counts_are_consistent(charges, charge, spin):
    atoms = [(z, (2.0 * k, 0.0, 0.0)) for k, z in enumerate(charges)]
    n = sum(charges) - charge
    if n <= 0 or spin > n or (n - spin) % 2:
        with pytest.raises(ValueError):
            el.molecule(atoms, charge=charge, spin=spin)
        return
    m = el.molecule(atoms, charge=charge, spin=spin)
    assert m.n_up + m.n_down == n
    assert m.n_up - m.n_down == spin
    assert m.charge == charge


def test_walkers_start_around_nuclei_by_charge():
    lih = el.molecule([("Li", (0, 0, 0)), ("H", (3.015, 0, 0))])
    assert lih.electron_sites().tolist() == [0, 0, 0, 1]
    x = np.asarray(lih.random(jax.random.PRNGKey(0), 200, width=0.01))
    assert x.shape == (200, 4, 3)
    near_h = np.linalg.norm(x - lih.positions[1], axis=-1) < 0.1
    near_li = np.linalg.norm(x - lih.positions[0], axis=-1) < 0.1
    assert np.all(near_h ^ near_li)
    assert np.all(near_h.sum(axis=1) == 1)  # one electron on H in every walker
    assert 0 < near_h[:, :2].sum() < 200  # the H electron is sometimes spin-up, sometimes down
    with pytest.raises(ValueError, match="width"):
        lih.random(jax.random.PRNGKey(0), 2, width=0.0)


@settings(max_examples=30)
@given(charge=st.one_of(st.floats(-1.5, 1.5).filter(lambda q: not float(q).is_integer()), st.just(1.0),
                        st.text(max_size=2), st.booleans(), st.just(1j)))
def test_non_integer_charge_raises_naming_it(charge):
    # atom("He", charge=0.5) used to build neutral He (int() truncation) and charge="1" was accepted
    with pytest.raises((TypeError, ValueError), match="charge"):
        el.atom("He", charge=charge)


def test_charge_or_spin_contradicting_the_electron_counts_raises():
    # they used to be ignored silently when n_up/n_down were given
    with pytest.raises(ValueError, match="charge=1 contradicts"):
        el.molecule([("Li", (0, 0, 0))], charge=1, n_up=2, n_down=1)
    with pytest.raises(ValueError, match="spin=1 contradicts"):
        el.molecule([("Li", (0, 0, 0))], spin=1, n_up=3, n_down=0)
    consistent = el.molecule([("Li", (0, 0, 0))], charge=1, spin=0, n_up=1, n_down=1)
    assert (consistent.n_up, consistent.n_down, consistent.charge) == (1, 1, 1.0)


def test_energy_components_print_as_labelled_lines():
    # used to print as a dump of the nested NamedTuples and arrays
    from psiloom import stats
    from psiloom.electrons.observables import EnergyComponents

    rng = np.random.default_rng(0)
    parts = [stats.estimate(c + 0.01 * rng.standard_normal((64, 4))) for c in (-2.9, 2.9, -5.8, -6.7, 0.9)]
    text = str(EnergyComponents(*parts, virial_ratio=-parts[2].mean / parts[1].mean))
    lines = text.splitlines()
    assert len(lines) == 6
    assert lines[0].startswith("total E") and str(parts[0]).split()[0] in lines[0] and "Array" not in text
    assert lines[-1].startswith("virial") and float(lines[-1].split()[2]) == pytest.approx(2.0, abs=0.01)
