"""The law of A_inf(tau), the number of surviving lines of descent.

External references: the series of Griffiths (1980) Theor. Popul. Biol. 17, evaluated
independently in 80+ digit decimal arithmetic; the pure death process it describes
(rate k(k+theta-1)/2 at k lines), simulated directly; the Griffiths (1984) J. Math.
Biol. 21 asymptotics; and the transition moments of the Wright-Fisher diffusion (Ewens
2004, Mathematical Population Genetics I), which follow from the generator.
"""

from __future__ import annotations

from decimal import Decimal, localcontext

import numpy as np
import pytest
from scipy import integrate
from scipy.special import digamma, ndtr

from chi_square import pooled_chi_square_pvalue

from driftscreen.neutral.lines_of_descent import (
    CorrectedNormal,
    LinesOfDescentSampler,
    corrected_normal_moments,
    lines_of_descent_mean_variance,
    lines_of_descent_pmf,
    lines_of_descent_table,
    series_pmf,
)

THETAS = (0.5, 2.0, 10.0, 100.0, 1000.0)
TAUS = (1e-4, 1e-3, 0.01, 0.05, 0.1, 0.3, 1.0, 3.0)


def exact_pmf(theta: float, tau: float, n_lines: int, digits: int) -> np.ndarray:
    """P(A_inf(tau) = m), m < n_lines, by the Griffiths (1980) series in decimal arithmetic.

    Source: Griffiths (1980) Theor. Popul. Biol. 17; Tavare (1984) Theor. Popul. Biol.
    26 (form of the terms from memory, as in the design note): sum_{k>=m} (-1)^(k-m) (2k+theta-1) (theta+m)_(k-1) / (m! (k-m)!)
    exp(-k(k+theta-1) tau / 2), with (a)_(j) the rising factorial and (a)_(-1) = 1/(a-1).
    """
    with localcontext() as context:
        context.prec = digits
        th, t = Decimal(repr(float(theta))), Decimal(repr(float(tau)))
        last = int(np.sqrt(2.0 * (2.31 * digits + 200.0) / tau)) + n_lines + 10
        decay = [(-(Decimal(k) * (k + th - 1) * t) / 2).exp() for k in range(last + 1)]
        out = []
        for m in range(n_lines):
            total = Decimal(1) if m == 0 else Decimal(0)
            rising = Decimal(1)
            for j in range(m - 1):
                rising *= th + m + j
            m_factorial = Decimal(1)
            for j in range(2, m + 1):
                m_factorial *= j
            gap_factorial = Decimal(1)
            first = max(m, 1)
            for k in range(first, last + 1):
                if k > first:
                    rising *= th + m + k - 2
                    gap_factorial *= k - m
                term = (2 * k + th - 1) * rising / (m_factorial * gap_factorial) * decay[k]
                total += term if (k - m) % 2 == 0 else -term
            out.append(float(total))
    return np.array(out)


def reference_digits(tau: float) -> int:
    """Working digits for :func:`exact_pmf`: the largest terms are ~exp(1.5 / tau)
    (design note section 3), i.e. 0.65 / tau decimal digits, plus 30 for the result."""
    return 30 + int(0.7 / tau)


def dense(table, size: int) -> np.ndarray:
    out = np.zeros(size)
    out[table.offset:table.offset + table.pmf.size] = table.pmf
    return out


def total_variation(a: np.ndarray, b: np.ndarray) -> float:
    return 0.5 * float(np.abs(a - b).sum())


def death_process_lines(theta: float, tau: float, n_runs: int, start_lines: int,
                        rng: np.random.Generator) -> np.ndarray:
    """Lines alive at time tau of the death process entering from infinity (direct MC).

    Holding time at k lines is Exp(k(k+theta-1)/2) (coalescence k(k-1)/2 plus
    immigration k theta/2; Griffiths 1980). The time to come down from infinity to
    ``start_lines`` is a sum of many tiny exponentials: drawn as a normal with the exact
    mean (digamma identity) and variance.
    """
    j = np.arange(start_lines + 1, 2_000_001, dtype=np.float64)
    inverse_rates = 2.0 / (j * (j + theta - 1.0))
    mean_down = 2.0 / (theta - 1.0) * (digamma(start_lines + theta) - digamma(start_lines + 1))
    var_down = float(np.sum(inverse_rates ** 2)) + 4.0 / (3.0 * j[-1] ** 3)
    clock = rng.normal(mean_down, np.sqrt(var_down), n_runs)
    lines = np.zeros(n_runs, dtype=np.int64)
    for k in range(start_lines, 0, -1):
        clock += rng.standard_exponential(n_runs) / (0.5 * k * (k + theta - 1.0))
        alive = clock > tau
        if alive.all():
            return lines + k
        lines += alive
    return lines


def pooled_chi_square(draws: np.ndarray, offset: int, pmf: np.ndarray) -> float:
    """Chi-square p-value of draws against a pmf, adjacent cells pooled to expected >= 5."""
    observed = np.bincount(draws - offset, minlength=pmf.size)[:pmf.size]
    assert observed.sum() == draws.size, "draws outside the tabulated support"
    expected = draws.size * pmf
    return pooled_chi_square_pvalue(observed, expected)


@pytest.mark.parametrize("theta", THETAS)
def test_pmf_is_a_probability_vector_and_the_series_sums_to_one(theta):
    methods = set()
    for tau in TAUS:
        table = lines_of_descent_table(theta, tau)
        methods.add(table.method)
        pmf = lines_of_descent_pmf(theta, tau)
        assert np.all(pmf >= 0)
        assert abs(pmf.sum() - 1.0) < 1e-12
        if table.method == "series":
            # the raw alternating series, before clipping and renormalising, sums to 1
            # within its own rounding-error bound (itself <= 1e-6)
            raw, bound = series_pmf(theta, tau, table.offset + table.pmf.size + 20)
            assert bound < 1e-6
            assert abs(raw.sum() - 1.0) < max(bound, 1e-15)
    assert methods == {"series", "normal"}


@pytest.mark.parametrize("theta", THETAS)
@pytest.mark.parametrize("tau", TAUS)
def test_mean_identity_of_the_transition(theta, tau):
    # Source: E[X_i(tau) | x] = p_i + (x_i - p_i) exp(-theta tau / 2) (generator moment
    # ODE; Ewens 2004) and E[X_i | A] = (theta p_i + A x_i)/(theta + A) give
    # E[A / (theta + A)] = exp(-theta tau / 2).
    table = lines_of_descent_table(theta, tau)
    lines = table.offset + np.arange(table.pmf.size)
    value = float(np.dot(table.pmf, lines / (theta + lines)))
    # measured worst errors: series 3e-10 (bound-limited), corrected normal 3.2e-6
    tolerance = 1e-9 if table.method == "series" else 1e-5
    assert abs(value - np.exp(-theta * tau / 2.0)) < tolerance


@pytest.mark.parametrize("theta,tau", [(0.5, 1.0), (0.5, 0.2), (2.0, 0.3), (10.0, 0.2),
                                       (10.0, 0.1), (100.0, 0.05), (1000.0, 0.02)])
def test_series_agrees_with_high_precision_evaluation(theta, tau):
    table = lines_of_descent_table(theta, tau)
    assert table.method == "series"
    size = table.offset + table.pmf.size + 10
    exact = exact_pmf(theta, tau, size, digits=reference_digits(tau))
    assert abs(exact.sum() - 1.0) < 1e-14
    raw, bound = series_pmf(theta, tau, size)
    # the rounding-error bound really bounds the error of the float64 series
    assert np.sum(np.abs(raw - exact)) <= bound
    assert np.sum(np.abs(dense(table, size) - exact)) < 2e-6


@pytest.mark.parametrize("theta,tau,worst_tv", [
    # TV limits: the design note's measurements (9.6e-4, 9.7e-4, 5.5e-4, 4.8e-4) x ~1.25
    (0.5, 0.05, 1.2e-3), (10.0, 0.05, 1.2e-3), (100.0, 0.02, 7e-4), (1000.0, 0.005, 6e-4)])
def test_corrected_normal_is_close_to_the_exact_law(theta, tau, worst_tv):
    table = lines_of_descent_table(theta, tau)
    assert table.method == "normal"
    size = table.offset + table.pmf.size + 10
    exact = exact_pmf(theta, tau, size, digits=reference_digits(tau))
    assert abs(exact.sum() - 1.0) < 1e-12  # the reference carried enough digits
    assert total_variation(dense(table, size), exact) < worst_tv
    # the uncorrected Griffiths normal is far worse (TV ~0.1 sqrt(tau)): the check can fail
    mean, variance = lines_of_descent_mean_variance(theta, tau)
    cdf = ndtr((np.arange(size) + 0.5 - mean) / np.sqrt(variance))
    plain = np.diff(cdf, prepend=0.0)
    assert total_variation(plain, exact) > 5 * worst_tv


@pytest.mark.parametrize("tau", [0.05, 0.03])
def test_series_is_refused_where_rounding_spoils_it(tau):
    # Design note section 3: for small tau the alternating series cancels catastrophically
    # (float64 at tau = 0.05, theta = 0.5: TV ~0.12); the bound must refuse it, and the
    # refused series must indeed be worse than the acceptance level.
    raw, bound = series_pmf(0.5, tau, 130)
    exact = exact_pmf(0.5, tau, 130, digits=reference_digits(tau))
    assert abs(exact.sum() - 1.0) < 1e-12  # the reference carried enough digits
    assert bound > 1e-6 and np.sum(np.abs(raw - exact)) <= bound
    assert total_variation(raw, exact) > 1e-6
    assert lines_of_descent_table(0.5, tau).method == "normal"


@pytest.mark.slow
@pytest.mark.parametrize("theta,tau,start_lines", [
    (0.5, 0.5, 400), (100.0, 0.05, 400), (10.0, 0.01, 1500), (0.5, 0.05, 600)])
def test_pmf_matches_monte_carlo_of_the_death_process(theta, tau, start_lines):
    rng = np.random.default_rng(1980)
    draws = death_process_lines(theta, tau, 100_000, start_lines, rng)
    table = lines_of_descent_table(theta, tau)
    # fixed seed; a correct pmf gives p ~ U(0,1), so p > 1e-3 fails one time in 1000
    assert pooled_chi_square(draws, table.offset, table.pmf) > 1e-3
    standard_error = draws.std() / np.sqrt(draws.size)
    assert abs(draws.mean() - table.mean) < 4.5 * standard_error  # 4.5 MC standard errors


@pytest.mark.slow
def test_death_process_check_rejects_the_uncorrected_normal():
    # The same check has the power to reject the plain Griffiths normal (TV ~0.02 here).
    theta, tau = 0.5, 0.05
    draws = death_process_lines(theta, tau, 100_000, 600, np.random.default_rng(1984))
    mean, variance = lines_of_descent_mean_variance(theta, tau)
    cdf = ndtr((np.arange(int(mean + 15 * np.sqrt(variance))) + 0.5 - mean) / np.sqrt(variance))
    cdf[-1] = 1.0
    assert pooled_chi_square(draws, 0, np.diff(cdf, prepend=0.0)) < 1e-6


def test_griffiths_asymptotics_limits_and_ode():
    # Source: Griffiths (1984) J. Math. Biol. 21: mu(tau) ~ 2/tau and V(tau) ~ 2/(3 tau)
    # as tau -> 0; mu solves d mu/d tau = -mu (mu + theta - 1)/2 from mu = inf, and V
    # solves the linear-noise equation dV/dtau = -2 lam'(mu) V + lam(mu) (van Kampen 1992,
    # Stochastic Processes in Physics and Chemistry, system-size expansion; from memory).
    for theta in THETAS:
        mean, variance = lines_of_descent_mean_variance(theta, 1e-7)
        assert mean * 1e-7 / 2 == pytest.approx(1.0, rel=1e-3)
        assert variance * 1e-7 * 1.5 == pytest.approx(1.0, rel=1e-3)
        for tau in (1e-3, 0.01, 0.1):
            step = tau * 1e-5
            (m0, v0), (m1, v1) = (lines_of_descent_mean_variance(theta, tau + s)
                                  for s in (-step, step))
            mean, variance = lines_of_descent_mean_variance(theta, tau)
            lam, slope = mean * (mean + theta - 1) / 2, mean + (theta - 1) / 2
            assert (m1 - m0) / (2 * step) == pytest.approx(-lam, rel=1e-6)
            assert (v1 - v0) / (2 * step) == pytest.approx(-2 * slope * variance + lam, rel=1e-5)
    # theta = 1 makes beta = 0 exactly: V = 2/(3 tau), mu = 2/tau
    assert lines_of_descent_mean_variance(1.0, 0.01) == pytest.approx((200.0, 200.0 / 3.0))


def test_corrections_limits_and_quadrature():
    # Design note section 3: delta -> -1/6, third cumulant S -> 2/(15 tau) as tau -> 0.
    for theta in (0.5, 10.0, 100.0):
        mean, variance, skew = corrected_normal_moments(theta, 1e-6)
        griffiths_mean, _ = lines_of_descent_mean_variance(theta, 1e-6)
        assert mean - griffiths_mean == pytest.approx(-1.0 / 6.0, abs=1e-3)
        assert skew * variance ** 1.5 * 1e-6 == pytest.approx(2.0 / 15.0, rel=1e-3)
    # the 64-point Gauss-Legendre rule agrees with adaptive quadrature (scipy.integrate.quad)
    theta, tau = 1000.0, 0.006
    mu = lambda u: lines_of_descent_mean_variance(theta, u)[0]  # noqa: E731
    var = lambda u: lines_of_descent_mean_variance(theta, u)[1]  # noqa: E731
    lam = lambda k: k * (k + theta - 1) / 2  # noqa: E731
    delta = -lam(mu(tau)) * integrate.quad(lambda u: var(u) / (2 * lam(mu(u))), 0, tau,
                                           epsabs=0, epsrel=1e-11, limit=200)[0]
    third = lam(mu(tau)) ** 3 * integrate.quad(
        lambda u: (3 * (mu(u) + (theta - 1) / 2) * var(u) - lam(mu(u)) - 3 * var(u) ** 2)
        / lam(mu(u)) ** 3, 0, tau, epsabs=0, epsrel=1e-11, limit=200)[0]
    mean, variance, skew = corrected_normal_moments(theta, tau)
    assert mean - mu(tau) == pytest.approx(delta, rel=1e-8)
    assert skew * variance ** 1.5 == pytest.approx(third, rel=1e-8)


def test_normal_table_has_the_corrected_moments():
    # After rounding, the table's mean is mu + delta and its variance is V (Sheppard's
    # correction puts V - 1/12 on the continuous approximant; Sheppard (1898) Proc. Lond.
    # Math. Soc. 29, from memory). Tolerances: Cornish-Fisher and rounding terms, measured.
    for theta, tau in ((0.5, 0.01), (10.0, 1e-3), (1000.0, 1e-4)):
        table = lines_of_descent_table(theta, tau)
        lines = table.offset + np.arange(table.pmf.size)
        mean, variance, _ = corrected_normal_moments(theta, tau)
        table_mean = np.dot(table.pmf, lines)
        assert table_mean == pytest.approx(mean, abs=2e-3)
        assert np.dot(table.pmf, (lines - table_mean) ** 2) == pytest.approx(variance, rel=2e-3)


def transition_moments(theta, p, x, tau):
    """Section 2 of the design note (Ewens 2004: moment equations from the generator)."""
    rho1, rho2 = np.exp(-theta * tau / 2), np.exp(-(1 + theta) * tau)
    d, pi = x - p, p * (1 - p)
    mean = p + d * rho1
    var = (pi * (1 - rho2) / (1 + theta) + 2 * (1 - 2 * p) * d * (rho1 - rho2) / (2 + theta)
           - d ** 2 * (rho1 ** 2 - rho2))
    return mean, var


@pytest.mark.parametrize("theta", THETAS)
def test_pmf_reproduces_the_transition_moments_without_monte_carlo(theta):
    # Mixing Beta-binomial algebra over the pmf of A must give the closed-form transition
    # mean and variance: E[X|A] = (theta p + A x)/(theta + A), E[X^2|A] from Dirichlet and
    # binomial moments. Tolerances: measured worst relative errors x ~3.
    for tau in (1e-4, 1e-3, 0.01, 0.05, 0.3, 3.0):
        table = lines_of_descent_table(theta, tau)
        lines = (table.offset + np.arange(table.pmf.size))[:, None]
        p, x = np.meshgrid([0.001, 0.05, 0.5], [0.0, 0.01, 0.3, 0.9])
        p, x = p.ravel()[None, :], x.ravel()[None, :]
        total = theta + lines
        first = (theta * p + lines * x) / total
        second = ((theta * p) ** 2 + theta * p + (2 * theta * p + 1) * lines * x
                  + lines * x * (1 - x) + (lines * x) ** 2) / (total * (total + 1))
        mean = table.pmf @ first
        var = table.pmf @ second - mean ** 2
        expected_mean, expected_var = transition_moments(theta, p[0], x[0], tau)
        tolerance = 1e-7 if table.method == "series" else 1e-3
        np.testing.assert_allclose(mean, expected_mean, rtol=tolerance, atol=1e-15)
        np.testing.assert_allclose(var, expected_var, rtol=tolerance, atol=1e-15)


def test_sampler_draws_follow_the_tables_and_cache_distinct_intervals():
    taus = np.array([0.3, 0.01, 0.3, 0.3, 0.01])
    sampler = LinesOfDescentSampler(10.0, taus)
    assert len(sampler.tables) == 2
    rng = np.random.default_rng(7)
    for index in (0, 1):
        draws = sampler.draw(index, 50_000, rng)
        assert draws.dtype == np.int64 and draws.shape == (50_000,)
        table = lines_of_descent_table(10.0, float(taus[index]))
        assert pooled_chi_square(draws, table.offset, table.pmf) > 1e-3  # fixed seed
    assert lines_of_descent_table(10.0, 0.3) is lines_of_descent_table(10.0, 0.3)


def test_invalid_parameters_are_rejected():
    with pytest.raises(ValueError):
        lines_of_descent_table(0.0, 0.1)
    with pytest.raises(ValueError):
        lines_of_descent_table(1.0, -0.1)


def test_direct_corrected_normal_equals_table_inversion() -> None:
    """The closed-form inverse of the corrected normal gives the same A as searching its
    table, uniform by uniform (both invert P(A <= m) = Phi(w - g (w^2 - 1)/6))."""
    theta, tau = 50.0, 2e-4
    table = lines_of_descent_table(theta, tau)
    assert table.method == "normal"
    mean, variance, skew = corrected_normal_moments(theta, tau)
    direct = CorrectedNormal(mean, np.sqrt(variance - 1.0 / 12.0), skew)
    uniforms = np.random.default_rng(0).random(50_000)
    from_table = np.searchsorted(table.cdf, uniforms, side="right") + table.offset
    assert np.array_equal(direct.draw(50_000, np.random.default_rng(0)), from_table)


def test_huge_line_counts_are_drawn_without_a_table() -> None:
    """theta = 4e9 over short intervals (a near-constant community) needs ~1e9 lines: the
    sampler must not tabulate them; the draws keep the Griffiths (1984) mean."""
    taus = np.array([1e-9, 2e-9, 5e-9])
    sampler = LinesOfDescentSampler(4e9, taus)
    assert isinstance(sampler.tables[0], CorrectedNormal)
    assert all(isinstance(law, CorrectedNormal) or law.pmf.size < 20_000
               for law in sampler.tables)
    draws = sampler.draw(0, 10_000, np.random.default_rng(1))
    mean, variance = lines_of_descent_mean_variance(4e9, 1e-9)
    assert abs(draws.mean() - mean) < 5 * np.sqrt(variance / 10_000) + 1
