"""Landau-Zener crossings and their composition (PHYSICS.md section 2).

The reference for one crossing is a direct numerical solution of the two-level
Schroedinger equation (scipy.integrate.solve_ivp); the closed form it must
approach is Zener's (1932, Proc. R. Soc. A 137, 696).

Convention (written down here, hbar = 1): in the diabatic (photon, dark photon)
basis

    i d/dt c = H(t) c,    H(t) = [[ a t / 2,  g ],
                                 [ g,  -a t / 2 ]],

the diabatic energies cross at t = 0 with relative slope a. Starting in diabatic
state 1 at t -> -inf, Zener's result for the probability of staying diabatic is
P_d = exp(-2 pi g^2 / a); the probability of following the adiabatic level, i.e.
ending in diabatic state 2 (photon -> dark photon), is p = 1 - exp(-gamma) with
gamma = 2 pi g^2 / a.

For photon -> dark photon with kinetic mixing epsilon (relativistic, small mixing;
e.g. Mirizzi, Redondo & Sigl 2009, JCAP 03, 026, from memory):
H = (1 / 2 omega) [[m_gamma^2(t), epsilon m^2], [epsilon m^2, m^2]] up to a multiple
of the identity, so a = m^2 |d ln m_gamma^2/dt| / (2 omega) at the crossing and
g = epsilon m^2 / (2 omega), which gives PHYSICS.md's
gamma = pi epsilon^2 m^2 / (omega |d ln m_gamma^2/dt|).
In dimensionless time tau = sqrt(a) t the problem depends on G = g / sqrt(a) only.
"""

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from raytrace.core.errors import InputError
from raytrace.physics.conversion import (
    combine_crossings,
    crossing_kernel,
    crossing_probability,
    landau_zener_exponent,
    probability_from_kernel,
)

GAMMAS = [0.01, 0.03, 0.1, 0.3, 1.0, 2.0, 3.0]


def _rhs(tau, c, G):
    return -1j * np.array([0.5 * tau * c[0] + G * c[1], G * c[0] - 0.5 * tau * c[1]])


def _hamiltonian(tau, G):
    return np.array([[0.5 * tau, G], [G, -0.5 * tau]])


def _solve(G, tau_max, start):
    solution = solve_ivp(
        _rhs, (-tau_max, tau_max), start.astype(complex), args=(G,), method="DOP853", rtol=1e-8, atol=1e-10
    )
    assert solution.success
    return solution.y[:, -1]


def conversion_adiabatic_projection(G, tau_max=30.0):
    """Start in the lower adiabatic level at -tau_max (diabatic state 1 as tau_max -> inf),
    end projected on the lower adiabatic level at +tau_max (diabatic state 2). Adiabatic
    populations have a tail O(G / tau_max^2), far smaller than the diabatic ones' O(G / tau_max)."""
    _, vectors = np.linalg.eigh(_hamiltonian(-tau_max, G))
    final = _solve(G, tau_max, vectors[:, 0])
    _, vectors = np.linalg.eigh(_hamiltonian(tau_max, G))
    return abs(np.vdot(vectors[:, 0], final)) ** 2


def conversion_diabatic(G, tau_max):
    """Plain diabatic start (state 1) and end (population of state 2)."""
    final = _solve(G, tau_max, np.array([1.0, 0.0]))
    return abs(final[1]) ** 2


def _physical_parameters(gamma):
    """epsilon, m, omega, rate (eV) for a crossing of exponent ``gamma`` in the physical
    Hamiltonian above, and the dimensionless coupling G = g / sqrt(a) that follows from them."""
    mass, omega, rate = 1e-13, 1e-3, 3.0e-33  # eV; rate ~ 2 H0 (PHYSICS.md s.2 magnitudes)
    a = mass**2 * rate / (2.0 * omega)
    # Choose epsilon so that 2 pi g^2 / a = gamma with g = epsilon m^2 / (2 omega).
    epsilon = np.sqrt(gamma * a / (2.0 * np.pi)) * 2.0 * omega / mass**2
    g = epsilon * mass**2 / (2.0 * omega)
    return epsilon, mass, omega, rate, g / np.sqrt(a)


@pytest.mark.parametrize("gamma", GAMMAS)
def test_landau_zener_against_schroedinger_equation(gamma):
    # Zener 1932 vs solve_ivp; the project's exponent is computed from the physical parameters.
    epsilon, mass, omega, rate, G = _physical_parameters(gamma)
    exponent = landau_zener_exponent(epsilon, mass, omega, rate)
    assert exponent == pytest.approx(gamma, rel=1e-10)
    numerical = conversion_adiabatic_projection(G)
    assert float(crossing_probability(exponent, saturate=True)) == pytest.approx(numerical, rel=1e-3)


@pytest.mark.parametrize("gamma", [0.01, 3.0])
def test_landau_zener_diabatic_populations_long_integration(gamma):
    # The diabatic populations themselves, integrated to |tau| = 80: they still carry the
    # finite-time oscillation tail of relative size ~ 0.8 / tau_max for small gamma, hence 2 %.
    epsilon, mass, omega, rate, G = _physical_parameters(gamma)
    numerical = conversion_diabatic(G, tau_max=80.0)
    exponent = landau_zener_exponent(epsilon, mass, omega, rate)
    assert float(crossing_probability(exponent, saturate=True)) == pytest.approx(numerical, rel=0.02)


def test_rate_sign_does_not_matter():
    # A falling and a rising m_gamma^2 convert alike (|d ln m^2/dt| in Zener's formula; the
    # equation with a -> -a is the complex conjugate one).
    assert landau_zener_exponent(1e-7, 1e-13, 1e-3, -2e-33) == landau_zener_exponent(1e-7, 1e-13, 1e-3, 2e-33)
    G = np.sqrt(0.5 / (2 * np.pi))
    start = np.array([1.0, 0.0], dtype=complex)
    options = dict(method="DOP853", rtol=1e-9, atol=1e-11)
    forward = solve_ivp(lambda t, c: -1j * (_hamiltonian(t, G) @ c), (-20, 20), start, **options).y[:, -1]
    backward = solve_ivp(lambda t, c: -1j * (_hamiltonian(-t, G) @ c), (-20, 20), start, **options).y[:, -1]
    assert abs(forward[1]) ** 2 == pytest.approx(abs(backward[1]) ** 2, rel=1e-6)
    # Not a trivial agreement: the population is near Zener's value (up to the diabatic tail at |tau| = 20).
    assert abs(forward[1]) ** 2 == pytest.approx(-np.expm1(-0.5), abs=0.05)


def test_linear_form_is_small_gamma_limit():
    # p = gamma for gamma << 1 (PHYSICS.md s.2): within gamma/2 of the numerical result.
    G = np.sqrt(0.01 / (2 * np.pi))
    numerical = conversion_adiabatic_projection(G)
    assert float(crossing_probability(0.01)) == 0.01
    assert float(crossing_probability(0.01)) == pytest.approx(numerical, rel=0.006)
    # ... and badly wrong at gamma = 1, where only the saturating form holds.
    G = np.sqrt(1.0 / (2 * np.pi))
    numerical = conversion_adiabatic_projection(G)
    assert abs(float(crossing_probability(1.0)) - numerical) > 0.3
    assert float(crossing_probability(1.0, saturate=True)) == pytest.approx(numerical, rel=1e-3)


def test_saturating_form_values():
    # p = 1 - exp(-gamma) (Zener 1932) and its limits.
    gamma = np.array([0.0, 1e-12, 0.5, 50.0])
    np.testing.assert_allclose(crossing_probability(gamma, saturate=True), -np.expm1(-gamma), rtol=1e-12, atol=0)
    assert float(crossing_probability(1e-12, saturate=True)) == pytest.approx(1e-12, rel=1e-9, abs=0)
    assert float(crossing_probability(50.0, saturate=True)) == pytest.approx(1.0, abs=1e-15)


# -- many crossings ----------------------------------------------------------------------------


def _transfer_monte_carlo(p, n_realisations, rng):
    """Average conversion over random phases between crossings: a product of 2x2 unitary
    crossing matrices with independent uniform phases (the incoherent limit of PHYSICS.md s.2)."""
    state = np.zeros((n_realisations, 2), dtype=complex)
    state[:, 0] = 1.0
    for p_i in p:
        phase = np.exp(1j * rng.uniform(0.0, 2 * np.pi, n_realisations))
        state[:, 0] *= phase
        state[:, 1] *= np.conj(phase)
        s, c = np.sqrt(p_i), np.sqrt(1.0 - p_i)
        state = np.stack((c * state[:, 0] - s * state[:, 1], s * state[:, 0] + c * state[:, 1]), axis=1)
    converted = np.abs(state[:, 1]) ** 2
    return converted.mean(), converted.std() / np.sqrt(n_realisations)


@pytest.mark.parametrize("p", [[0.1] * 8, [0.3, 0.05, 0.6, 0.2], [0.45, 0.45, 0.45]])
def test_incoherent_composition_matches_random_phase_average(p):
    # Monte Carlo over random phases of transfer-matrix products vs (1 - prod(1 - 2 p_i)) / 2.
    rng = np.random.default_rng(20240602)
    mean, error = _transfer_monte_carlo(np.array(p), 200_000, rng)
    combined = float(combine_crossings(p, saturate=True))
    assert combined == pytest.approx(mean, abs=5 * error + 1e-12)
    # The linear sum is far off here: the check can tell the two forms apart.
    assert abs(float(combine_crossings(p)) - mean) > 10 * error


def test_composition_reduces_to_sum_for_small_p():
    # (1 - prod(1 - 2 p))/2 = sum p - 2 sum_{i<j} p_i p_j + ... (expansion; common practice, no source).
    p = np.array([1e-5, 3e-6, 2e-5, 7e-6])
    linear = float(combine_crossings(p))
    assert linear == pytest.approx(p.sum(), rel=1e-15)
    pair_sum = 0.5 * (p.sum() ** 2 - (p**2).sum())
    assert float(combine_crossings(p, saturate=True)) == pytest.approx(p.sum() - 2 * pair_sum, rel=1e-8)
    assert float(combine_crossings(p, saturate=True)) == pytest.approx(linear, rel=1e-4)


def test_composition_along_axis():
    # Rows are independent rays; the composition runs along the chosen axis.
    p = np.array([[0.1, 0.2, 0.0], [0.0, 0.0, 0.5]])
    np.testing.assert_allclose(combine_crossings(p, saturate=True, axis=1), [0.5 * (1 - 0.8 * 0.6), 0.5])
    np.testing.assert_allclose(combine_crossings(p, axis=0), [0.1, 0.2, 0.5])
    # One crossing composes to itself (p = (1 - (1 - 2p))/2).
    assert float(combine_crossings([0.37], saturate=True)) == pytest.approx(0.37, rel=1e-14)
    # No crossings, no conversion.
    assert float(combine_crossings(np.zeros(0), saturate=True)) == 0.0


# -- the kernel and P = epsilon^2 K / omega_0 --------------------------------------------------


def test_crossing_kernel_physics_md_example():
    # PHYSICS.md s.3: homogeneous, fully ionised: d ln m^2/dt = -3 H0 at z = 0 with
    # H0 = 1.443e-33 eV; K(m = 1.74e-14 eV) = 2.2e5 eV; epsilon = 1e-7, omega_0 = 2.35e-4 eV
    # give P = 9e-6 (printed to 2 and 1 figures).
    kernel = float(crossing_kernel(1.74e-14, 0.0, -3.0 * 1.443e-33))
    assert kernel == pytest.approx(2.2e5, abs=0.05e5)
    assert float(probability_from_kernel(kernel, 1e-7, 2.35e-4)) == pytest.approx(9e-6, abs=0.5e-6)


def test_crossing_kernel_formula():
    # K = pi m^2 / ((1 + z_c) |d ln m_gamma^2/dt|) (PHYSICS.md s.2), vectorised, sign of the rate ignored.
    mass = np.array([1e-14, 1e-13, 1e-12])
    z = np.array([0.5, 8.0, 200.0])
    rate = np.array([-1e-32, 2e-31, -5e-30])
    np.testing.assert_allclose(crossing_kernel(mass, z, rate), np.pi * mass**2 / ((1 + z) * np.abs(rate)), rtol=1e-15)


def test_kernel_factorises_the_landau_zener_exponent():
    # PHYSICS.md s.2: with omega = omega_0 (1 + z_c), gamma = epsilon^2 K / omega_0.
    mass, z_c, rate, epsilon, omega0 = 3e-13, 5.8, -4.2e-32, 2e-8, 6.6e-4
    gamma = landau_zener_exponent(epsilon, mass, omega0 * (1 + z_c), rate)
    kernel = crossing_kernel(mass, z_c, rate)
    assert float(probability_from_kernel(kernel, epsilon, omega0)) == pytest.approx(float(gamma), rel=1e-13)


def test_probability_from_kernel_saturating_is_limit_of_many_small_crossings():
    # Many equal small crossings: (1 - (1 - 2 P/N)^N)/2 -> (1 - exp(-2 P))/2 as N -> inf.
    kernel, epsilon, omega0 = 4.0e9, 1e-7, 2.35e-4
    linear = float(probability_from_kernel(kernel, epsilon, omega0))
    assert linear == pytest.approx(epsilon**2 * kernel / omega0, rel=1e-15)
    assert linear > 0.1  # a regime where saturation matters
    saturated = float(probability_from_kernel(kernel, epsilon, omega0, saturate=True))
    many = float(combine_crossings(np.full(100_000, linear / 100_000), saturate=True))
    assert saturated == pytest.approx(many, rel=1e-4)
    assert saturated == pytest.approx(0.5 * (1 - np.exp(-2 * linear)), rel=1e-12)
    assert saturated < linear


def test_probability_from_kernel_broadcasts():
    kernel = np.array([1e5, 2e5])[:, None]
    epsilon = np.array([1e-8, 1e-7, 1e-6])[None, :]
    P = probability_from_kernel(kernel, epsilon, 2.35e-4)
    assert P.shape == (2, 3)
    np.testing.assert_allclose(P, epsilon**2 * kernel / 2.35e-4, rtol=1e-15)


# -- bad input -----------------------------------------------------------------------------------


@pytest.mark.parametrize("bad", [-0.1, np.nan, np.inf, [0.1, -1.0]])
def test_bad_gamma(bad):
    with pytest.raises(InputError, match="gamma"):
        crossing_probability(bad)
    with pytest.raises(InputError, match="gamma"):
        crossing_probability(bad, saturate=True)


@pytest.mark.parametrize("epsilon, omega0, what", [(-1e-7, 2.35e-4, "epsilon"), (np.nan, 2.35e-4, "epsilon"), (1e-7, 0.0, "omega0"), (1e-7, -1.0, "omega0"), (1e-7, np.nan, "omega0")])
def test_bad_probability_arguments(epsilon, omega0, what):
    with pytest.raises(InputError, match=what):
        probability_from_kernel(2.2e5, epsilon, omega0)
