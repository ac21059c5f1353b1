"""The exact crossing solver against independent calculations.

Sources: an independent tracer written with scipy and astropy (tests/reference_tracer.py);
the two-level Schroedinger equation integrated with scipy.integrate.solve_ivp and the
check values of PHYSICS.md section 9; Ai from scipy.special (DLMF 9); the one-point-PDF
identity of PHYSICS.md section 4 (Caputo, Liu, Mishra-Sharma & Ruderman 2020); the
homogeneous kernel of PHYSICS.md section 3 with H(z) from astropy's Planck18.
"""

import numpy as np
import pytest
from astropy.cosmology import Planck18
from reference_tracer import HBAR_EV_S, PLASMA_M2_PER_DENSITY, PlanckRedshift, one_point_pdf_mean, trace_run
from scipy import ndimage, optimize, special
from scipy.integrate import solve_ivp

import raytrace
from raytrace.boxes import Box, BoxSeries
from raytrace.core.errors import InputError
from raytrace.kernels.polynomial import ROOT_TOLERANCE, airy_ai, bracketed_root, roots_in
from raytrace.kernels.tangent import XI_CUT, pair_kernel
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory
from raytrace.statistics.meancheck import MeanCheckWarning
from raytrace.statistics.onepoint import FrozenBlendWarning
from raytrace.tracing.rays import draw_rays, plan_rays

X_E = 1.08  # constant ionisation: hydrogen plus singly ionised helium (PHYSICS.md section 5)


@pytest.fixture(scope="module")
def plasma():
    return MeanPlasma(None, IonisationHistory.constant(X_E))


def random_box(cells, seed, smoothing=1.0):
    """A positive, lumpy field with mean 1: exp of smoothed Gaussian noise."""
    rng = np.random.default_rng(seed)
    field = ndimage.gaussian_filter(rng.standard_normal((cells,) * 3), smoothing, mode="wrap")
    values = np.exp(field / field.std())
    return values / values.mean()


# -- per ray -----------------------------------------------------------------------------------
def reference_rays(box, series, z_max, mass, seed, rays, plasma):
    """Kernel, crossings and DM of ``rays`` from the independent tracer, segment by segment.

    One box at z = 0 serves 0..z_max; segment g is one box length of travel,
    [g L, (g + 1) L] in chi (chi from astropy), entered at the point and heading
    the engine drew for it (the geometry is an input here, tested in test_rays.py).
    """
    plan = plan_rays(plasma.cosmology, series, z_max)
    _, starts, directions, _ = draw_rays(seed, rays, plan, [box.n_cells])
    size, cell = box.box_size_cMpc, box.cell_size_cMpc
    chi_end = Planck18.comoving_distance(z_max).to_value("Mpc")
    assert plan.n_segments == int(np.ceil(chi_end / size))
    redshift = PlanckRedshift(z_max)
    values = box.data.astype(np.float64) * box.comoving_scale
    out = []
    for r in range(len(rays)):
        kernel, crossings, dm = np.zeros(mass.size), np.zeros(mass.size, dtype=int), 0.0
        for g in range(plan.n_segments):
            chi_a, chi_b = g * size, min((g + 1) * size, chi_end)
            k, c, d = trace_run(values, starts[r, g], directions[r, g], (chi_b - chi_a) / cell, chi_a, cell, mass,
                                redshift)
            kernel, crossings, dm = kernel + k, crossings + c, dm + d
        out.append((kernel, crossings, dm))
    return out


def small_random_series(plasma, z_max=0.02):
    """(box, series, lowest and highest resonant mass) of a 12^3 random box out to z_max."""
    values = random_box(12, seed=4)
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    box = Box.from_array(values * n_com, "15 cMpc", 0.0, quantity="n_e_comoving", plasma=plasma)
    return (box, BoxSeries([box]), *box.plasma_mass_range(0.0, z_max))


def test_every_crossing_of_every_ray_matches_an_independent_root_finder(plasma):
    z_max = 0.02
    box, series, low, high = small_random_series(plasma, z_max)
    mass = np.geomspace(low * 1.02, high * 0.98, 9)
    rays = list(range(6))
    result = raytrace.cast_sightlines(series, mass, len(rays), z_max=z_max, include_background=False,
                                      plasma=plasma, seed=11)
    reference = reference_rays(box, series, z_max, mass, 11, rays, plasma)
    compared = 0
    for r, (kernel, crossings, dm) in enumerate(reference):
        plain = result.tangent_events[r] == 0  # no Airy event: the Landau-Zener sum on both sides
        np.testing.assert_array_equal(result.crossings[r, plain], crossings[plain])
        # Measured 5.1e-6 (the engine's (1+z)^3 is linear over a cell); 5e-5 leaves a factor 10.
        np.testing.assert_allclose(result.kernel_boxes[r, plain], kernel[plain], rtol=5e-5, atol=0)
        # DM: measured 1.6e-8 (the reference's trapezoid at 1/512 cell; the engine integrates the cubic
        # exactly); 1e-6 leaves the trapezoid room on rays with sharper cells.
        np.testing.assert_allclose(result.dispersion_measure_boxes[r], dm, rtol=1e-6)
        compared += int(np.sum(crossings[plain]))
    assert compared > 200


# At 1e-2 eV the Airy form moves K away from the one-point mean, which has no Airy form, and 8 rays are few:
# the built-in check's warning is expected; the counts are the subject here.
@pytest.mark.filterwarnings("ignore::raytrace.statistics.meancheck.MeanCheckWarning")
def test_airy_pairs_count_both_of_their_crossings_on_every_ray(plasma):
    # A high photon energy widens the Airy window (~omega^(2/3)), so many pairs are taken in the Airy form:
    # each claimed pair still counts its two crossings, and no claim hides any other crossing, so the
    # counts of every ray and mass equal the independent tracer's sign changes.
    z_max = 0.02
    box, series, low, high = small_random_series(plasma, z_max)
    mass = np.geomspace(low * 1.02, high * 0.98, 24)
    rays = list(range(8))
    result = raytrace.cast_sightlines(series, mass, len(rays), z_max=z_max, include_background=False,
                                      plasma=plasma, seed=11, photon_energy_eV=1e-2)
    reference = reference_rays(box, series, z_max, mass, 11, rays, plasma)
    assert result.tangent_events.sum() >= 10  # the check has Airy pairs to look at
    for r, (_, crossings, _) in enumerate(reference):
        np.testing.assert_array_equal(result.crossings[r], crossings)


def test_jumps_between_copies_add_no_crossing(plasma):
    # Two halves of different uniform density: inside the box the interpolant ramps between them
    # (crossings there are real), but where a ray leaves one copy and enters the next the value
    # jumps, and masses inside the jump must not resonate (PHYSICS.md section 8).
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    values = np.full((8,) * 3, n_com)
    values[4:] *= 3.0
    box = Box.from_array(values, "12 cMpc", 0.0, quantity="n_e_comoving", plasma=plasma)
    series = BoxSeries([box])
    z_max = 0.01
    mass = np.sqrt(PLASMA_M2_PER_DENSITY * n_com * np.array([1.3, 2.0, 2.7]))
    rays = list(range(5))
    result = raytrace.cast_sightlines(series, mass, len(rays), z_max=z_max, include_background=False,
                                      plasma=plasma, seed=2)
    reference = reference_rays(box, series, z_max, mass, 2, rays, plasma)
    for r, (kernel, crossings, _) in enumerate(reference):
        np.testing.assert_array_equal(result.crossings[r], crossings)
        # Measured 7.8e-8 (linear (1+z)^3 over a cell against the reference's brentq); 1e-6 leaves a factor 10.
        np.testing.assert_allclose(result.kernel_boxes[r], kernel, rtol=1e-6)
    # Each passage through a ramp crosses each of these masses once; a ray crosses ~2 ramps per box length.
    assert result.crossings.min() > 0


def test_snapshot_seams_add_no_crossing(plasma):
    # Two uniform snapshots, z = 0 and 1, the second twice as dense; unblended, the nearer one serves,
    # so at z = 0.5 n_e jumps from n (1.5)^3 to 2 n (1.5)^3. Masses in the jump get nothing; the others
    # get the homogeneous kernel pi m^2 / (3 (1+z) H(z)) of their own box (PHYSICS.md section 3).
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    boxes = [Box.from_array(np.full((8,) * 3, f * n_com), "50 cMpc", z, quantity="n_e_comoving", plasma=plasma)
             for z, f in ((0.0, 1.0), (1.0, 2.0))]
    densities = n_com * np.array([1.2**3, 1.4**3, 1.5**3 * 1.3, 1.5**3 * 1.8, 2 * 1.7**3, 2 * 1.9**3])
    mass = np.sqrt(PLASMA_M2_PER_DENSITY * densities)
    result = raytrace.cast_sightlines(BoxSeries(boxes), mass, 3, z_max=1.0, include_background=False,
                                      plasma=plasma)
    np.testing.assert_array_equal(result.crossings, np.broadcast_to([1, 1, 0, 0, 1, 1], result.crossings.shape))
    own = np.array([1, 1, 1, 1, 2, 2]) * n_com
    one_plus_z = (densities / own) ** (1 / 3)
    hubble_eV = Planck18.H(one_plus_z - 1).to_value("1/s") * HBAR_EV_S
    expected = np.pi * mass**2 / (3 * one_plus_z * hubble_eV)
    expected[2:4] = 0.0
    # Measured 2e-7: the tables' linear 1+z; 1e-5 leaves room and catches a 0.1 % slip.
    np.testing.assert_allclose(result.kernel_boxes, np.broadcast_to(expected, result.kernel_boxes.shape),
                               rtol=1e-5, atol=0)


def test_blended_snapshots_follow_the_linear_blend_of_n_e(plasma):
    # Blended uniform snapshots at z = 0 and 1: n_com(z) = (1 - z) n_a + z n_b. The crossing of m^2
    # sits where (4 pi alpha / m_e) n_com(z) (1+z)^3 = m^2 (brentq), with
    # |d ln n / dt| = (1+z) H |(n_b - n_a) / n_com + 3 / (1+z)| (PHYSICS.md sections 2-3).
    n_a = float(plasma.mean_comoving_electron_density_cm3(0.0))
    n_b = 1.5 * n_a
    boxes = [Box.from_array(np.full((8,) * 3, n, np.float64), "50 cMpc", z, quantity="n_e_comoving", plasma=plasma)
             for z, n in ((0.0, n_a), (1.0, n_b))]
    mass = np.geomspace(np.sqrt(PLASMA_M2_PER_DENSITY * n_a) * 1.01, np.sqrt(PLASMA_M2_PER_DENSITY * n_b * 8) * 0.99, 6)
    # A uniform blended pair is the case the one-point mean's frozen blend gets wrong (its docstring: up to
    # 20 % off while its error is tiny): both warnings must come, the MC/PDF check failing by far.
    with pytest.warns(FrozenBlendWarning, match="frozen"), pytest.warns(MeanCheckWarning, match="at 6 of 6 masses"):
        result = raytrace.cast_sightlines(BoxSeries(boxes, blend=True), mass, 3, z_max=1.0,
                                          include_background=False, plasma=plasma)
    for k, m in enumerate(mass):
        def excess(z):
            return PLASMA_M2_PER_DENSITY * ((1 - z) * n_a + z * n_b) * (1 + z) ** 3 - m**2
        z_r = optimize.brentq(excess, 0.0, 1.0, xtol=1e-14)
        n_r = (1 - z_r) * n_a + z_r * n_b
        hubble_eV = Planck18.H(z_r).to_value("1/s") * HBAR_EV_S
        rate = (1 + z_r) * hubble_eV * abs((n_b - n_a) / n_r + 3 / (1 + z_r))
        # Measured ~1e-7 (linear 1+z and blend weight over each cell); 1e-5 catches a 0.1 % slip.
        np.testing.assert_allclose(result.kernel_boxes[:, k], np.pi * m**2 / ((1 + z_r) * rate), rtol=1e-5)
        assert np.all(result.crossings[:, k] == 1)


# -- near-tangent pairs ---------------------------------------------------------------------------
def two_level_probability(delta, omega=0.5, m2=1.0, curvature=1.0, epsilon=1e-3, half_span=30.0):
    """|photon -> dark photon amplitude|^2 through m_gamma^2 - m^2 = delta + a tau^2 / 2, from the
    two-level equation i psi' = [[(m_gamma^2 - m^2)/(2 omega), eps m^2/(2 omega)], [., 0]] psi in the
    interaction picture, integrated with solve_ivp (DOP853). Truncation at |tau| = 30 leaves an oscillating
    error: measured up to 0.7 % (the difference between |tau| = 30 and 60 over the deltas tested)."""
    coupling = epsilon * m2 / (2 * omega)

    def rhs(tau, y):
        turn = np.exp(1j * (delta * tau + curvature * tau**3 / 6) / (2 * omega))
        return [-1j * coupling * np.conj(turn) * y[1], -1j * coupling * turn * y[0]]

    solution = solve_ivp(rhs, (-half_span, half_span), np.array([1 + 0j, 0j]), method="DOP853", rtol=1e-9,
                         atol=1e-12)
    return abs(solution.y[1, -1]) ** 2


@pytest.mark.parametrize("delta", [1.0, 0.0, -1.0, -2.0, -4.0, -8.0])
def test_airy_pair_kernel_matches_the_two_level_equation(delta):
    # PHYSICS.md section 9 units: omega = 0.5, m^2 = 1, a = 1, epsilon = 1e-3, z = 0; P = eps^2 K / omega.
    probability = 1e-6 * pair_kernel(1.0, 1.0, 0.5, 1.0, delta) / 0.5
    # Measured up to 0.72 % (delta = -2), the reference's own truncation error (see above): 1 % covers it.
    np.testing.assert_allclose(probability, two_level_probability(delta), rtol=0.01)


def test_airy_pair_kernel_reproduces_the_published_check_values():
    # PHYSICS.md section 9 table, "Airy P" column (4 digits): the formula itself, to half a unit in the
    # table's last digit (measured at most 2.1e-4 relative, delta = -1, against 3.0e-4 allowed there).
    for delta, airy in ((1.0, "6.067e-7"), (0.0, "7.899e-6"), (-1.0, "1.686e-5"), (-2.0, "9.908e-7"),
                        (-4.0, "7.092e-6")):
        half_unit = 0.5e-3 / float(airy.split("e")[0])
        assert 1e-6 * pair_kernel(1.0, 1.0, 0.5, 1.0, delta) / 0.5 == pytest.approx(float(airy), rel=half_unit)


def test_airy_pair_averages_to_the_two_landau_zener_terms():
    # For xi << -1, Ai^2 oscillates about 1/(2 pi sqrt|xi|), whose sum is the two Landau-Zener terms
    # sqrt(2) pi eps^2 m^4 / (omega sqrt|a Delta|) (PHYSICS.md section 9). In units omega = 0.5, m^2 = a = 1:
    omega, scale = 0.5, 2 ** (1 / 3) * 0.5 ** (2 / 3)  # xi = Delta / scale at a = 1
    prefactor = np.pi**2 / omega * (4 * omega) ** (2 / 3) * scale  # K per unit Ai^2, times d Delta / d xi
    # (1) Over xi in [-8, -2] the kernel's integral is the closed form int Ai^2 = [xi Ai^2 - Ai'^2]
    #     (DLMF 9.11.E5; Ai, Ai' from scipy): the normalisation and our Ai together.
    deltas = np.linspace(-8.0 * scale, -2.0 * scale, 40001)
    airy = np.array([pair_kernel(1.0, 1.0, omega, 1.0, d) for d in deltas])
    ai, aip = special.airy(np.array([-8.0, -2.0]))[:2]
    closed = prefactor * ((-2.0 * ai[1] ** 2 - aip[1] ** 2) - (-8.0 * ai[0] ** 2 - aip[0] ** 2))
    # Measured 1.7e-9 (the trapezoid over 40001 points); 1e-6 leaves room for other platforms' Ai.
    assert np.trapezoid(airy, deltas) == pytest.approx(closed, rel=1e-6)
    # (2) Over the whole window |xi| < XI_CUT (crossings and near misses) the kernel integrates to the
    #     two Landau-Zener terms integrated over the crossing side, 2 sqrt(2) pi sqrt(D) for Delta in
    #     [-D, 0]: so on average over rays the pair keeps the Landau-Zener mean.
    edge = XI_CUT * scale
    deltas = np.linspace(-edge, edge, 200001)
    airy = np.array([pair_kernel(1.0, 1.0, omega, 1.0, d) for d in deltas])
    # Measured 7e-12; 1e-8 is the trapezoid's error bound at this spacing, many times over.
    assert np.trapezoid(airy, deltas) == pytest.approx(2 * np.sqrt(2) * np.pi * np.sqrt(edge), rel=1e-8)


def test_airy_function_matches_scipy():
    # Over the engine's window |xi| < XI_CUT and beyond on the oscillating side; measured 2e-9 relative
    # (1.1e-11 absolute, near the zeros); 1e-7 leaves a factor 50.
    x = np.linspace(-8.0, 5.0, 261)
    ours = np.array([airy_ai(v) for v in x])
    np.testing.assert_allclose(ours, special.airy(x)[0], rtol=1e-7, atol=1e-14)


def test_the_window_keeps_the_mean_of_the_landau_zener_terms():
    # XI_CUT is where int_{-X}^{X} Ai^2 = int_{-X}^{0} 1/(2 pi sqrt|xi|) = sqrt(X)/pi (scipy.special.airy,
    # scipy.integrate.quad): so replacing the pair by the Airy form changes no mean over rays.
    from scipy.integrate import quad

    inside = quad(lambda t: special.airy(t)[0] ** 2, -XI_CUT, XI_CUT, limit=200)[0]
    # Measured exact to double precision; 1e-8 is quad's own default relative tolerance (1.5e-8).
    assert inside == pytest.approx(np.sqrt(XI_CUT) / np.pi, rel=1e-8)


def test_polynomial_roots_are_all_found_once():
    # Roots placed by hand: (x - r1)(x - r2)... times random scales, up to the quartic slope of a
    # blended density; numpy's polyfromroots builds the coefficients.
    rng = np.random.default_rng(3)
    for _ in range(300):
        degree = rng.integers(1, 5)
        roots = np.sort(rng.uniform(-0.5, 1.5, degree))
        coefficients = np.polynomial.polynomial.polyfromroots(roots) * rng.uniform(-3, 3)
        padded = np.zeros(5)
        padded[:degree + 1] = coefficients
        n, out = roots_in(*padded, 1.0)
        inside = roots[(roots > 0) & (roots < 1)]
        # Near-double roots can merge within rounding; the test draws them apart.
        if np.min(np.diff(roots), initial=1.0) < 1e-3:
            continue
        assert n == inside.size
        np.testing.assert_allclose(out[:n], inside, atol=1e-9)


def test_bracketed_root_and_its_slope_match_numpy_on_random_quintics():
    # numpy.polynomial.polynomial.polyroots as the outside reference; every start (far, near,
    # outside the bracket) must give the root within ROOT_TOLERANCE and the slope there within what
    # that offset moves it (|p''| ROOT_TOLERANCE, doubled for the estimate's own error).
    rng = np.random.default_rng(5)
    checked = 0
    for _ in range(1000):
        c = rng.normal(size=6) * np.array([1.0, 1.0, 0.3, 0.1, 0.03, 0.01])
        roots = np.polynomial.polynomial.polyroots(c)
        real = np.sort(roots[(np.abs(roots.imag) < 1e-12) & (roots.real > 0.05) & (roots.real < 0.95)].real)
        if real.size != 1:
            continue
        root = real[0]
        slope = np.polynomial.polynomial.polyval(root, np.polynomial.polynomial.polyder(c))
        curvature = np.polynomial.polynomial.polyval(root, np.polynomial.polynomial.polyder(c, 2))
        g_low, g_high = np.polynomial.polynomial.polyval([0.0, 1.0], c)
        if abs(slope) < 1e-2 or g_low * g_high >= 0:
            continue
        checked += 1
        for start in (-1.0, root + 1e-5, root - 0.3, 0.999):
            x, x_slope = bracketed_root(*c, 0.0, 1.0, g_low, g_high, start)
            assert abs(x - root) <= ROOT_TOLERANCE
            assert abs(x_slope - slope) <= 2.0 * abs(curvature) * ROOT_TOLERANCE + 1e-14 * abs(slope)
    assert checked > 100


# -- the mean over rays ---------------------------------------------------------------------------
def test_monte_carlo_mean_equals_the_one_point_pdf_integral_on_a_clumpy_box(plasma):
    # A non-smooth box: a log-normal field with sharp single-cell peaks (x 30) and 8 % empty cells.
    rng = np.random.default_rng(8)
    values = random_box(24, seed=8, smoothing=0.7)
    values[rng.random(values.shape) < 0.01] *= 30.0
    values[rng.random(values.shape) < 0.08] = 0.0
    n_com = float(plasma.mean_comoving_electron_density_cm3(0.0))
    box = Box.from_array(values * n_com, "40 cMpc", 0.0, quantity="n_e_comoving", plasma=plasma)
    z_max = 0.2
    positive = values[values > 0]
    low = np.sqrt(PLASMA_M2_PER_DENSITY * n_com * np.percentile(positive, 0.5))
    high = np.sqrt(PLASMA_M2_PER_DENSITY * n_com * values.max() * (1 + z_max) ** 3)
    mass = np.geomspace(low, high * 0.9, 14)
    result = raytrace.cast_sightlines(box, mass, 10_000, z_max=z_max, include_background=False, plasma=plasma,
                                      seed=5, n_jobs=2, batch_size=2000)
    expected, expected_error = one_point_pdf_mean(values, n_com, mass, z_max, 4_000_000, seed=1)
    error = np.sqrt(result.standard_error() ** 2 + expected_error**2)
    # Within 3 combined standard errors at every mass, the ends included: measured pulls at most 1.8; the
    # errors are 0.2 % (mid-range) to 53 % (the highest mass, which only the x 30 peaks reach).
    assert np.all(np.abs(result.mean() - expected) <= 3 * error), ((result.mean() / expected - 1), error / expected)
    assert np.all(expected > 0)


# -- the spread between rays ----------------------------------------------------------------------
def bootstrap_spread(kernel, resamples, seed):
    """std/mean of each column and its bootstrap standard error (numpy resampling of rows)."""
    rng = np.random.default_rng(seed)
    ratio = kernel.std(axis=0, ddof=1) / kernel.mean(axis=0)
    draws = np.empty((resamples, kernel.shape[1]))
    for b in range(resamples):
        pick = kernel[rng.integers(0, kernel.shape[0], kernel.shape[0])]
        draws[b] = pick.std(axis=0, ddof=1) / pick.mean(axis=0)
    return ratio, draws.std(axis=0, ddof=1)


def test_the_spread_between_sightlines_is_stable_on_the_demo_series(demo_series):
    mass = np.geomspace(4e-15, 3e-13, 16)
    runs = [raytrace.cast_sightlines(demo_series, mass, 4000, z_max=6.0, seed=seed, n_jobs=2, batch_size=1000)
            for seed in (1, 2)]
    (ratio_a, error_a), (ratio_b, error_b) = (bootstrap_spread(r.kernel_boxes, 200, seed=0) for r in runs)
    well = np.minimum(runs[0].crossings.mean(axis=0), runs[1].crossings.mean(axis=0)) >= 5
    assert well.sum() >= 10
    # Issue acceptance: two seeds agree within twice their combined bootstrap errors at every mass.
    assert np.all(np.abs(ratio_a - ratio_b)[well] <= 2 * np.hypot(error_a, error_b)[well]), (ratio_a, ratio_b)
    # PHYSICS.md section 9: with the uniform form no single event carries more than a few times a ray's
    # mean K, where rays cross a mass often (>= 50 times here): the largest ray's K is measured at 11.5 and
    # 7.6 times the mean (seeds 1 and 2, 4000 rays each), against 20 to 50 with half-cell finite differences
    # (issue 10). The maximum of 4000 rays moves a lot between seeds (those two values), so the bound, 15,
    # sits 30 % above the larger and still well below the old solver's 20. At the ends of the range, where
    # a ray crosses a mass a few times, one rare resonance may dominate: that is physics.
    often = np.minimum(runs[0].crossings.mean(axis=0), runs[1].crossings.mean(axis=0)) >= 50
    assert often.sum() >= 6
    for run in runs:
        assert np.all(run.kernel_boxes[:, often].max(axis=0) < 15 * run.kernel_boxes[:, often].mean(axis=0))
    # The near-tangent events are counted and carry a finite share of the kernel: measured at most 2.9 %
    # (seed 1) and 2.6 % (seed 2) where rays cross often; 6 % leaves a factor 2.
    assert np.all(runs[0].tangent_events.sum(axis=0)[often] > 0)
    assert np.all(runs[0].tangent_share()[often] < 0.06)


# -- options ------------------------------------------------------------------------------------
@pytest.mark.filterwarnings("ignore::raytrace.statistics.meancheck.MeanCheckWarning")  # 2 rays: too few for the built-in check, as it says
def test_the_photon_energy_is_recorded_and_checked(plasma):
    box = Box.from_array(random_box(8, seed=1), "10 cMpc", 0.0, quantity="overdensity", plasma=plasma)
    mass = np.geomspace(1e-14, 2e-14, 3)
    result = raytrace.cast_sightlines(box, mass, 2, z_max=0.01, include_background=False, plasma=plasma,
                                      photon_energy_eV=np.float32(1e-3))
    assert result.run["photon_energy_eV"] == pytest.approx(1e-3, rel=1e-7)
    for bad in (0.0, -1.0, float("nan"), "1e-3"):
        with pytest.raises(InputError, match="photon_energy_eV"):
            raytrace.cast_sightlines(box, mass, 2, z_max=0.01, plasma=plasma, photon_energy_eV=bad)


@pytest.mark.parametrize("removed", ["step", "density_floor"])
def test_removed_options_are_refused_with_the_reason(plasma, removed):
    box = Box.from_array(random_box(8, seed=1), "10 cMpc", 0.0, quantity="overdensity", plasma=plasma)
    with pytest.raises(InputError, match=f"{removed}: no longer an option"):
        raytrace.cast_sightlines(box, np.array([1e-14]), 2, z_max=0.01, plasma=plasma, **{removed: 0.5})
    with pytest.raises(InputError, match=f"{removed}: no longer an option"):
        raytrace.cast_sky(box, np.array([1e-14]), 1, z_max=0.01, plasma=plasma, **{removed: 0.5})


def test_a_run_file_that_still_sets_the_step_is_refused_with_the_reason(tmp_path):
    from raytrace.cli.runfile import SIGHTLINE_OPTIONS, read_run_file

    path = tmp_path / "run.toml"
    path.write_text("[rays]\nstep_cells = 0.5\n")
    with pytest.raises(InputError, match=r"rays.step_cells is no longer an option: .*exactly"):
        read_run_file(path, SIGHTLINE_OPTIONS)
