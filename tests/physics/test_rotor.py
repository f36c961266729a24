"""Quantum-rotor quantities (mdrotor.physics.rotor).

Reference spectrum: the free planar rigid rotor, E_L = hbar^2 L^2 / (2 I),
L integer (common practice, no source); constants from scipy.constants
(CODATA). Spin statistics and the exchange sign: REFERENCES.md "Rotor
coherence" (odd number of fermionic constituents = fermion, common
practice, no source; an N-cycle has sign (-1)^(N-1)).
"""

import itertools

import numpy as np
import pytest
from scipy.constants import atomic_mass, electron_mass, h, hbar

from mdrotor.errors import InputError
from mdrotor.physics import rotor


def _pair_inertia():
    """Two 40Ca+ ions 5 um apart rotating about their midpoint, kg m^2."""
    import periodictable

    m = periodictable.Ca[40].mass * atomic_mass - electron_mass   # isotope mass from periodictable
    r = 2.5e-6
    return 2 * m * r**2


def _energy(L, I):
    return hbar**2 * np.asarray(L, dtype=float) ** 2 / (2 * I)


# ---------------------------------------------------------------------------
# spectrum
# ---------------------------------------------------------------------------
def test_transition_frequencies_match_energy_differences():
    # free planar rotor spectrum (common practice, no source)
    I = _pair_inertia()
    for L in (0, 1, 17, 2500, -40):
        f_rot = hbar * L / (2 * np.pi * I)
        lines = rotor.transition_frequencies_hz(f_rot, I, k_max=5)
        direct = (_energy(L + lines.k, I) - _energy(L, I)) / h
        # rounding only: E_L / h is a difference of numbers ~ L^2 quanta
        np.testing.assert_allclose(lines.centre_hz, direct, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(rotor.L_from_f_rot(f_rot, I), L, rtol=0, atol=1e-9)


def test_rotational_quantum_is_second_difference_of_spectrum():
    # (E_{L+1} - 2 E_L + E_{L-1}) / h = hbar / (2 pi I) for E_L ~ L^2
    I = _pair_inertia()
    L = 300
    second = (_energy(L + 1, I) - 2 * _energy(L, I) + _energy(L - 1, I)) / h
    np.testing.assert_allclose(rotor.hbar_over_I_hz(I), second, rtol=1e-9)  # cancellation of L^2 ~ 1e5


def test_line_width_is_spread_of_line_over_L_distribution():
    # The line L -> L + k over an ensemble of integer L: its standard
    # deviation, computed directly from the spectrum, is k hbar sigma_L/(2 pi I)
    # (the line is linear in L). Discrete, non-Gaussian ensemble on purpose.
    I = _pair_inertia()
    rng = np.random.default_rng(np.random.SeedSequence(4))
    L = rng.integers(800, 900, 5000)
    p = rng.uniform(0, 1, 5000)
    p /= p.sum()
    mean_L = np.sum(p * L)
    sigma_L = np.sqrt(np.sum(p * (L - mean_L) ** 2))
    f_rot = hbar * mean_L / (2 * np.pi * I)
    lines = rotor.transition_frequencies_hz(f_rot, I, k_max=4, sigma_L_hbar=sigma_L)
    for k, centre, width in zip(*lines):
        f = (_energy(L + k, I) - _energy(L, I)) / h
        mean_f = np.sum(p * f)
        std_f = np.sqrt(np.sum(p * (f - mean_f) ** 2))
        np.testing.assert_allclose(width, std_f, rtol=1e-9)
        # centre at the mean L: the mean of a linear function (rounding only)
        np.testing.assert_allclose(centre, mean_f, rtol=1e-12)


# ---------------------------------------------------------------------------
# exchange and revival
# ---------------------------------------------------------------------------
def _orientation(L_low, t, I, n_grid=512):
    """Mean orientation arg<e^{i phi}> of (|L> + |L+1>)/sqrt2 after time t,
    from |psi(phi, t)|^2 on a grid, psi = sum_L c_L e^{i L phi - i E_L t/hbar}."""
    phi = np.linspace(0, 2 * np.pi, n_grid, endpoint=False)
    Ls = np.array([L_low, L_low + 1])
    # E_L t / hbar = (hbar t / 2 I) L^2
    phases = np.outer(phi, Ls) - (hbar * t / (2 * I)) * Ls.astype(float) ** 2
    psi = np.exp(1j * phases).sum(axis=1) / np.sqrt(2)
    dens = np.abs(psi) ** 2
    return np.angle(np.sum(dens * np.exp(1j * phi)))


@pytest.mark.parametrize("N", [2, 3, 4])
@pytest.mark.parametrize("k", [1, 2, 5])
def test_exchange_and_revival_from_wavepacket_orientation(N, k):
    # A packet (|L> + |L+1>) turns rigidly at hbar (L + 1/2) / I: its
    # orientation arg<e^{i phi}> = (E_{L+1} - E_L) t / hbar (planar-rotor
    # spectrum, common practice). Two packets k quanta apart must have turned
    # by 2 pi / N relative to each other after the exchange time, by pi after
    # half the revival time and by 2 pi after the revival time.
    I = _pair_inertia()
    L = 37
    t_ex = rotor.exchange_time_s(I, k, N)
    t_rev = rotor.revival_time_s(I, k)
    np.testing.assert_allclose(t_rev, N * t_ex, rtol=1e-14)

    def rel(t):
        d = _orientation(L + k, t, I) - _orientation(L, t, I)
        return np.mod(d, 2 * np.pi)

    # phases up to hbar L^2 t / I ~ 1e4 rad: rounding ~ 1e-12 rad
    np.testing.assert_allclose(rel(t_ex), 2 * np.pi / N, rtol=0, atol=1e-9)
    np.testing.assert_allclose(rel(0.5 * t_rev), np.pi, rtol=0, atol=1e-9)
    assert min(rel(t_rev), 2 * np.pi - rel(t_rev)) < 1e-9
    # sign of k is irrelevant
    assert rotor.exchange_time_s(I, -k, N) == t_ex


# ---------------------------------------------------------------------------
# ladder and statistics
# ---------------------------------------------------------------------------
def _cycle_sign(N):
    """Sign of the cyclic permutation i -> i+1 mod N by counting inversions."""
    perm = [(i + 1) % N for i in range(N)]
    inv = sum(1 for a, b in itertools.combinations(range(N), 2) if perm[a] > perm[b])
    return -1 if inv % 2 else 1


def _ring(n, r, phase=0.0, z=0.0):
    a = phase + 2 * np.pi * np.arange(n) / n
    return np.c_[r * np.cos(a), r * np.sin(a), np.full(n, z)]


def _allowed_by_brute_force(pos, species, N):
    """Allowed L in [-12, 12] of a crystal that a turn by 2 pi/N maps onto
    itself: the permutation by nearest image, its sign for identical
    particles from the inversion count of each fermionic species' own
    permutation (bosons +1), and the L whose rotor phase e^{2 pi i L/N}
    equals it (common practice, no source)."""
    c, s = np.cos(2 * np.pi / N), np.sin(2 * np.pi / N)
    turned = pos @ np.array([[c, s, 0], [-s, c, 0], [0, 0, 1]])
    perm = [int(np.argmin(np.linalg.norm(pos - t, axis=1))) for t in turned]
    assert sorted(perm) == list(range(len(pos)))
    sign = 1
    for name in {sp.name for sp in species}:
        idx = [i for i, sp in enumerate(species) if sp.name == name]
        assert all(species[perm[i]].name == name for i in idx)
        inv = sum(1 for a, b in itertools.combinations(idx, 2) if perm[a] > perm[b])
        if species[idx[0]].statistics == "fermion":
            sign *= -1 if inv % 2 else 1
    return {L for L in range(-12, 13) if np.isclose(np.exp(2j * np.pi * L / N), sign, atol=1e-12)}


D_ION = 3e-6


def _cases():
    from mdrotor.physics.species import get_species

    ca, ca43, ca44, be = (get_species(n) for n in ("40Ca+", "43Ca+", "44Ca+", "9Be+"))
    d = D_ION
    centre = np.zeros((1, 3))
    # (name, positions, species, hand-derived (N, cycles, modulus, residue), ion-count rule's (mod, residue))
    return [
        # two identical ions: the turn by pi is one transposition; bosons even L,
        # fermions odd L (the ortho-hydrogen rule with symmetric spins)
        ("two bosons 9Be+", _ring(2, d), [be] * 2, (2, 1, 2, 0)),
        ("two fermions 40Ca+", _ring(2, d), [ca] * 2, (2, 1, 2, 1)),
        # a 3-cycle is even: L = 0 mod 3 for bosons and fermions alike
        ("triangle 40Ca+", _ring(3, d), [ca] * 3, (3, 1, 3, 0)),
        ("triangle 9Be+", _ring(3, d), [be] * 3, (3, 1, 3, 0)),
        # a 4-cycle is odd: fermions L = 2 mod 4, bosons 0 mod 4
        ("square 40Ca+", _ring(4, d), [ca] * 4, (4, 1, 4, 2)),
        ("square 9Be+", _ring(4, d), [be] * 4, (4, 1, 4, 0)),
        # five on a ring around one on the axis: C5, one even 5-cycle, L = 0 mod 5
        # (the ion count 6 would say L = 3 mod 6)
        ("5+1 centred ring 40Ca+", np.r_[centre, _ring(5, d)], [ca] * 6, (5, 1, 5, 0)),
        # six around one: C6, an odd 6-cycle of fermions, L = 3 mod 6 (ion count 7: 0 mod 7)
        ("6+1 centred ring 40Ca+", np.r_[centre, _ring(6, d)], [ca] * 7, (6, 1, 6, 3)),
        # a string of three through the axis: the turn by pi swaps the outer two
        ("string of 3 through the axis", np.array([[-d, 0, 0], [0, 0, 0], [d, 0, 0]]), [ca] * 3, (2, 1, 2, 1)),
        # two pairs on a line: two transpositions, sign +1
        ("string of 4", np.array([[-2 * d, 0, 0], [-d, 0, 0], [d, 0, 0], [2 * d, 0, 0]]), [ca] * 4, (2, 2, 2, 0)),
        # unlike ions: no turn maps the crystal onto itself, every L
        ("40Ca+ beside 44Ca+", _ring(2, d), [ca, ca44], (1, 0, 1, 0)),
        # alternating square of two species: C2, one transposition per species;
        # 40Ca+ and 44Ca+ both fermions (-1)(-1) = +1: even L
        ("square 40Ca+ 44Ca+ alternating", _ring(4, d), [ca, ca44, ca, ca44], (2, 2, 2, 0)),
        # 43Ca+ is a boson (43 + 19 constituents): only the 40Ca+ pair's sign, odd L
        ("square 40Ca+ 43Ca+ alternating", _ring(4, d), [ca, ca43, ca, ca43], (2, 2, 2, 1)),
        # a triangle with one corner moved off: no symmetry
        ("distorted triangle", _ring(3, d) + np.array([[0.02 * d, 0, 0], [0, 0, 0], [0, 0, 0]]), [ca] * 3, (1, 0, 1, 0)),
    ]


@pytest.mark.parametrize("case", _cases(), ids=lambda c: c[0])
def test_allowed_ladder_from_the_crystal(case):
    # Hand-derived ladders: a turn by 2 pi/N mapping the crystal onto itself is
    # a permutation of identical ions; an N-cycle has the sign (-1)^(N-1)
    # (REFERENCES.md, "Rotor coherence"), each fermionic species' permutation
    # gives its sign and bosons +1; the rotor factor e^{2 pi i L/N} must equal
    # it: the rule that restricts the rotational levels of molecules with
    # identical nuclei (Landau and Lifshitz, Quantum Mechanics, 3rd ed., §86
    # and §105, from memory).
    name, pos, species, (N, cycles, mod, res) = case
    lad = rotor.allowed_L_ladder(pos, species)
    assert (lad.symmetry_order, lad.cycles, lad.modulus, lad.residue) == (N, cycles, mod, res)
    ladder = {L for L in range(-12, 13) if L % lad.modulus == lad.residue}
    assert ladder == {L for L in range(-12, 13) if lad.allows(L)}
    if N > 1:
        assert ladder == _allowed_by_brute_force(pos, species, N)
    else:
        assert ladder == set(range(-12, 13)) and lad.statistics == "distinguishable"


def test_ladder_ignores_the_crystal_orientation_and_scale():
    # The symmetry is of the crystal's shape: a turned, shrunk, shifted square
    # has the same ladder (common practice, no source).
    from mdrotor.physics.species import get_species

    ca = get_species("40Ca+")
    pos = _ring(4, 1e-7, phase=0.37, z=2e-6) + np.array([5e-6, -3e-6, 0])
    lad = rotor.allowed_L_ladder(pos, [ca] * 4)
    assert (lad.symmetry_order, lad.modulus, lad.residue, lad.statistics) == (4, 4, 2, "fermion")
    # every ion on the axis (a string along z): nothing turns, no restriction
    lad = rotor.allowed_L_ladder(np.array([[0, 0, -D_ION], [0, 0, D_ION]]), [ca] * 2)
    assert (lad.symmetry_order, lad.modulus, lad.residue) == (1, 1, 0)


def test_unknown_statistics_gives_no_restriction():
    from mdrotor.physics.species import custom_species

    x = custom_species(6.6e-26, 1, name="X+")
    assert x.statistics == "unknown"
    lad = rotor.allowed_L_ladder(_ring(2, D_ION), [x, x])
    assert (lad.symmetry_order, lad.modulus, lad.residue, lad.statistics) == (2, 1, 0, "unknown")


def test_statistics_of_known_particles():
    # Textbook cases (common practice, no source): helium-4 atom boson,
    # helium-3 atom fermion (superfluid He-3 needs pairing), proton fermion,
    # deuteron and alpha particle bosons.
    import periodictable

    Z = {s: periodictable.elements.symbol(s).number for s in ("H", "He", "Be", "Ca", "Sr", "Yb")}
    assert rotor.statistics_of(4, Z["He"], 0) == "boson"
    assert rotor.statistics_of(3, Z["He"], 0) == "fermion"
    assert rotor.statistics_of(1, Z["H"], 1) == "fermion"
    assert rotor.statistics_of(2, Z["H"], 1) == "boson"
    assert rotor.statistics_of(4, Z["He"], 2) == "boson"
    # trapped-ion species: nucleons + electrons (Z - 1)
    assert rotor.statistics_of(40, Z["Ca"], 1) == "fermion"    # 40 + 19
    assert rotor.statistics_of(43, Z["Ca"], 1) == "boson"      # 43 + 19
    assert rotor.statistics_of(9, Z["Be"], 1) == "boson"       # 9 + 3
    assert rotor.statistics_of(88, Z["Sr"], 1) == "fermion"    # 88 + 37
    assert rotor.statistics_of(171, Z["Yb"], 1) == "boson"     # 171 + 69


def test_bad_input_names_the_argument():
    with pytest.raises(InputError, match="I_kg_m2: a finite number > 0"):
        rotor.hbar_over_I_hz(-1.0)
    with pytest.raises(InputError, match="k: a nonzero integer"):
        rotor.exchange_time_s(1e-36, 0, 3)
    with pytest.raises(InputError, match="N: an integer >= 1"):
        rotor.exchange_time_s(1e-36, 1, 0)
    with pytest.raises(InputError, match="k_max: an integer >= 1"):
        rotor.transition_frequencies_hz(1e5, 1e-36, 0)
    with pytest.raises(InputError, match="sigma_L_hbar: a finite number >= 0"):
        rotor.transition_frequencies_hz(1e5, 1e-36, 2, sigma_L_hbar=-1)
    with pytest.raises(InputError, match="positions_m: an \\(n, 3\\) array with one species per ion"):
        rotor.allowed_L_ladder(np.zeros((3, 3)), [])
    with pytest.raises(InputError, match="charge: at most the atomic number"):
        rotor.statistics_of(40, 20, 21)
    with pytest.raises(InputError, match="mass_number: an integer"):
        rotor.statistics_of(40.5, 20, 1)
