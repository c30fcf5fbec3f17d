//! Average run lengths (ARL) of a rule set: how many subgroups pass, on average, before a
//! signal — in control (the false-alarm rate) and after a sustained shift of the mean.
//!
//! Shifts are in standard deviations of the plotted point (σ/√n for subgroup means). The ARL
//! covers the rules on the location chart; dispersion-chart and reading rules are not counted.
//!
//! Methods, chosen by what the rule set allows:
//! * **markov** — exact: the rule states (cluster masks, run counters) form a finite Markov
//!   chain over the zones a point can fall in (Champ and Woodall, Technometrics 29(4), 1987);
//!   built by exploring every reachable state, then solved for the expected time to absorption.
//! * **integral-equation** — a single EWMA (Crowder, Technometrics 29(4), 1987) or a single
//!   tabular CUSUM started at zero (two one-sided CUSUMs combined as 1/ARL = 1/ARL⁺ + 1/ARL⁻),
//!   solved by the Nyström method with Gauss–Legendre quadrature. A CUSUM with a head start is
//!   simulated: both sums then start above zero together, and halving the one-sided
//!   head-start ARL (as an earlier version did) overstates it (447.9 for 429 at k = 0.5, h = 5).
//! * **monte-carlo** — anything else (trends, alternation, mixtures of EWMA or CUSUM with other
//!   rules): simulated runs with a 95% confidence interval for the mean.

use std::collections::HashMap;

use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use rand_distr::StandardNormal;
use serde::Serialize;
use statrs::distribution::{ContinuousCDF, Normal};

use super::config::{RuleKind, RuleSet};
use super::point::{ChartBasis, PointEvaluator, RuleState};

/// How an ARL was obtained.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Method {
    Markov,
    IntegralEquation,
    MonteCarlo,
}

impl Method {
    pub fn name(self) -> &'static str {
        match self {
            Method::Markov => "markov",
            Method::IntegralEquation => "integral-equation",
            Method::MonteCarlo => "monte-carlo",
        }
    }
}

/// The ARL at one shift.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ArlResult {
    /// Mean shift in sigmas of the plotted point.
    pub shift: f64,
    pub arl: f64,
    pub method: Method,
    /// 95% confidence interval (Monte Carlo only).
    pub ci95: Option<[f64; 2]>,
    /// Size of the Markov chain, or of the quadrature.
    pub states: Option<usize>,
    /// Simulated runs (Monte Carlo only).
    pub runs: Option<u64>,
    /// Simulated runs stopped at the maximum run length without a signal: when there are
    /// any, `arl` is a lower bound.
    #[serde(default, skip_serializing_if = "is_zero")]
    pub censored: u64,
}

fn is_zero(n: &u64) -> bool {
    *n == 0
}

/// Knobs for the calculations.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ArlOptions {
    /// Simulated runs per shift for Monte Carlo.
    pub runs: u64,
    /// Seed, so a Monte Carlo result can be reproduced.
    pub seed: u64,
    /// A Markov chain larger than this falls back to Monte Carlo.
    pub max_states: usize,
    /// A simulated run is stopped (and counted at this length) after this many points.
    pub max_run_length: u64,
}

impl Default for ArlOptions {
    fn default() -> Self {
        ArlOptions {
            runs: 20_000,
            seed: 1984,
            max_states: 250_000,
            max_run_length: 10_000_000,
        }
    }
}

/// Why an ARL could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ArlError {
    #[error("the rule set has no rules on plotted subgroups, so it never signals on a mean shift")]
    NoPointRules,
    #[error("shift {0} is not a finite number of sigmas")]
    BadShift(f64),
}

/// Computes the ARL of `set` at each of `shifts`.
pub fn arl(set: &RuleSet, shifts: &[f64], opts: &ArlOptions) -> Result<Vec<ArlResult>, ArlError> {
    if let Some(s) = shifts.iter().find(|s| !s.is_finite()) {
        return Err(ArlError::BadShift(*s));
    }
    let location: Vec<&RuleKind> = set
        .point_rules()
        .map(|r| &r.kind)
        .filter(|k| {
            !matches!(
                k,
                RuleKind::BeyondLimits {
                    chart: super::config::ChartSide::Dispersion
                }
            )
        })
        .collect();
    if location.is_empty() {
        return Err(ArlError::NoPointRules);
    }
    if let [RuleKind::Ewma { lambda, width }] = location[..] {
        return Ok(shifts
            .iter()
            .map(|&d| integral(ewma_arl(*lambda, *width, d, EWMA_NODES), d, EWMA_NODES))
            .collect());
    }
    // With a head start both sums start above zero together, and the two one-sided ARLs no
    // longer combine: that case is simulated (with its interval), not computed.
    if let [
        RuleKind::Cusum {
            k, h, head_start, ..
        },
    ] = location[..]
        && *head_start == 0.0
    {
        return Ok(shifts
            .iter()
            .map(|&d| integral(cusum_arl(*k, *h, d, CUSUM_NODES), d, CUSUM_NODES))
            .collect());
    }
    if let Some(chain) = Chain::build(set, opts.max_states) {
        return Ok(shifts.iter().map(|&d| chain.solve(d)).collect());
    }
    Ok(shifts.iter().map(|&d| monte_carlo(set, d, opts)).collect())
}

fn integral(arl: f64, shift: f64, nodes: usize) -> ArlResult {
    ArlResult {
        shift,
        arl,
        method: Method::IntegralEquation,
        ci95: None,
        states: Some(nodes),
        runs: None,
        censored: 0,
    }
}

/// The Markov chain of a rule set whose future depends only on the zone of each new point.
struct Chain {
    /// Zone boundaries, ascending; zone i lies between edges[i-1] and edges[i] (open ends).
    edges: Vec<f64>,
    /// For each state and zone, the next state (None: a rule fires).
    next: Vec<Vec<Option<usize>>>,
}

impl Chain {
    fn build(set: &RuleSet, max_states: usize) -> Option<Self> {
        let mut e = PointEvaluator::new(set, ChartBasis::standard());
        e.markov_key()?;
        let mut edges = vec![0.0, 3.0, -3.0];
        for r in e.rules() {
            match r.kind {
                RuleKind::Cluster {
                    beyond_sigma: s, ..
                }
                | RuleKind::AvoidingCentre {
                    beyond_sigma: s, ..
                }
                | RuleKind::HuggingCentre {
                    within_sigma: s, ..
                } => edges.extend([s, -s]),
                _ => {}
            }
        }
        edges.sort_by(f64::total_cmp);
        edges.dedup();
        let mut reps = Vec::with_capacity(edges.len() + 1);
        reps.push(edges[0] - 1.0);
        for w in edges.windows(2) {
            reps.push((w[0] + w[1]) / 2.0);
        }
        reps.push(edges[edges.len() - 1] + 1.0);

        let start: Vec<RuleState> = e.rule_states_mut().clone();
        let mut index: HashMap<Vec<u64>, usize> = HashMap::new();
        let mut states: Vec<Vec<RuleState>> = vec![start.clone()];
        index.insert(e.markov_key()?, 0);
        let mut next = Vec::new();
        let mut i = 0;
        while i < states.len() {
            let mut row = Vec::with_capacity(reps.len());
            for &z in &reps {
                *e.rule_states_mut() = states[i].clone();
                e.clear_last();
                if e.step(z, 3.0, -3.0) != 0 {
                    row.push(None);
                    continue;
                }
                let key = e.markov_key()?;
                let j = match index.get(&key) {
                    Some(&j) => j,
                    None => {
                        if states.len() >= max_states {
                            return None;
                        }
                        let j = states.len();
                        states.push(e.rule_states_mut().clone());
                        index.insert(key, j);
                        j
                    }
                };
                row.push(Some(j));
            }
            next.push(row);
            i += 1;
        }
        Some(Chain { edges, next })
    }

    fn solve(&self, shift: f64) -> ArlResult {
        let z = Normal::standard();
        let mut cdf: Vec<f64> = vec![0.0];
        cdf.extend(self.edges.iter().map(|e| z.cdf(e - shift)));
        cdf.push(1.0);
        let p: Vec<f64> = cdf.windows(2).map(|w| w[1] - w[0]).collect();
        // Gauss–Seidel on L = 1 + P·L, from L = 0, until the start state's value settles.
        let n = self.next.len();
        let mut l = vec![0.0f64; n];
        let mut last_start = f64::NAN;
        for sweep in 0..2_000_000u64 {
            for s in (0..n).rev() {
                let mut v = 1.0;
                for (zone, t) in self.next[s].iter().enumerate() {
                    if let Some(t) = t {
                        v += p[zone] * l[*t];
                    }
                }
                l[s] = v;
            }
            if sweep % 16 == 15 {
                if (l[0] - last_start).abs() <= 1e-11 * l[0] {
                    break;
                }
                last_start = l[0];
            }
        }
        ArlResult {
            shift,
            arl: l[0],
            method: Method::Markov,
            ci95: None,
            states: Some(n),
            runs: None,
            censored: 0,
        }
    }
}

fn monte_carlo(set: &RuleSet, shift: f64, opts: &ArlOptions) -> ArlResult {
    // Each shift gets its own stream, so adding a shift does not change the others' results.
    let rng = StdRng::seed_from_u64(opts.seed ^ shift.to_bits());
    let mut r = simulate(
        set,
        |rng: &mut StdRng| rng.sample::<f64, _>(StandardNormal) + shift,
        3.0,
        -3.0,
        opts,
        rng,
    );
    r.shift = shift;
    r
}

/// Simulated run lengths of `set`: each run steps the rules with standardized values from
/// `draw` against limits at `zu` and `zl` sigmas until a rule fires; the mean with its 95%
/// confidence interval. What the plotted points are (normal means, binomial or Poisson counts
/// standardized) is `draw`'s.
pub fn simulate(
    set: &RuleSet,
    mut draw: impl FnMut(&mut StdRng) -> f64,
    zu: f64,
    zl: f64,
    opts: &ArlOptions,
    mut rng: StdRng,
) -> ArlResult {
    let mut e = PointEvaluator::new(set, ChartBasis::standard());
    let start = e.rule_states_mut().clone();
    let (mut sum, mut sum_sq) = (0.0f64, 0.0f64);
    let runs = opts.runs.max(2);
    let mut censored = 0;
    for _ in 0..runs {
        *e.rule_states_mut() = start.clone();
        e.clear_last();
        let mut t = 0u64;
        loop {
            t += 1;
            if e.step(draw(&mut rng), zu, zl) != 0 {
                break;
            }
            if t >= opts.max_run_length {
                censored += 1;
                break;
            }
        }
        let t = t as f64;
        sum += t;
        sum_sq += t * t;
    }
    let n = runs as f64;
    let mean = sum / n;
    let sd = ((sum_sq - n * mean * mean) / (n - 1.0)).max(0.0).sqrt();
    let half = 1.96 * sd / n.sqrt();
    ArlResult {
        shift: 0.0,
        arl: mean,
        method: Method::MonteCarlo,
        ci95: Some([mean - half, mean + half]),
        states: None,
        runs: Some(runs),
        censored,
    }
}

const EWMA_NODES: usize = 160;
const CUSUM_NODES: usize = 96;

/// ARL of a two-sided EWMA with asymptotic limits ±width·√(λ/(2−λ)), started at the centre,
/// for points N(shift, 1):
/// `L(u) = 1 + (1/λ)·∫ L(y)·φ((y − (1−λ)u)/λ − shift) dy` over the in-control band.
pub fn ewma_arl(lambda: f64, width: f64, shift: f64, nodes: usize) -> f64 {
    let h = width * (lambda / (2.0 - lambda)).sqrt();
    let (x, w) = gauss_legendre(nodes, -h, h);
    let kernel = |u: f64, y: f64| phi((y - (1.0 - lambda) * u) / lambda - shift) / lambda;
    let n = x.len();
    let mut a = vec![vec![0.0; n]; n];
    for i in 0..n {
        for j in 0..n {
            a[i][j] = -w[j] * kernel(x[i], x[j]);
        }
        a[i][i] += 1.0;
    }
    let l = solve(a, vec![1.0; n]);
    1.0 + (0..n).map(|j| w[j] * kernel(0.0, x[j]) * l[j]).sum::<f64>()
}

/// ARL of a two-sided tabular CUSUM started at zero (reference k, interval h, in sigmas of
/// the point) for points N(shift, 1): 1/ARL = 1/ARL⁺ + 1/ARL⁻ (common practice for zero
/// starts; a head start is simulated instead, as the two sums then start above zero together).
pub fn cusum_arl(k: f64, h: f64, shift: f64, nodes: usize) -> f64 {
    let up = one_sided_cusum_arl(k, h, 0.0, shift, nodes);
    let down = one_sided_cusum_arl(k, h, 0.0, -shift, nodes);
    1.0 / (1.0 / up + 1.0 / down)
}

/// The one-sided CUSUM's ARL from `start` (the integral equation below), for checks against
/// published one-sided tables.
pub fn one_sided_cusum(k: f64, h: f64, start: f64, shift: f64) -> f64 {
    one_sided_cusum_arl(k, h, start, shift, CUSUM_NODES)
}

/// `L(u) = 1 + L(0)·Φ(k − u − δ) + ∫₀ʰ L(y)·φ(y + k − u − δ) dy`, evaluated at `start`.
fn one_sided_cusum_arl(k: f64, h: f64, start: f64, shift: f64, nodes: usize) -> f64 {
    let (x, w) = gauss_legendre(nodes, 0.0, h);
    let n = x.len();
    let norm = Normal::standard();
    // Unknowns: L(0), then L at each node.
    let mut a = vec![vec![0.0; n + 1]; n + 1];
    let points: Vec<f64> = std::iter::once(0.0).chain(x.iter().copied()).collect();
    for (i, &u) in points.iter().enumerate() {
        a[i][0] -= norm.cdf(k - u - shift);
        for j in 0..n {
            a[i][j + 1] -= w[j] * phi(x[j] + k - u - shift);
        }
        a[i][i] += 1.0;
    }
    let l = solve(a, vec![1.0; n + 1]);
    1.0 + l[0] * norm.cdf(k - start - shift)
        + (0..n)
            .map(|j| w[j] * phi(x[j] + k - start - shift) * l[j + 1])
            .sum::<f64>()
}

fn phi(x: f64) -> f64 {
    (-0.5 * x * x).exp() / (2.0 * std::f64::consts::PI).sqrt()
}

/// Gauss–Legendre nodes and weights on [a, b] (Newton's method on the Legendre polynomial).
pub fn gauss_legendre(n: usize, a: f64, b: f64) -> (Vec<f64>, Vec<f64>) {
    let mut x = vec![0.0; n];
    let mut w = vec![0.0; n];
    let (mid, half) = ((a + b) / 2.0, (b - a) / 2.0);
    for i in 0..n.div_ceil(2) {
        let mut z = (std::f64::consts::PI * (i as f64 + 0.75) / (n as f64 + 0.5)).cos();
        let mut dp = 0.0;
        for _ in 0..100 {
            let (mut p0, mut p1) = (1.0, z);
            for k in 2..=n {
                let p2 = ((2 * k - 1) as f64 * z * p1 - (k - 1) as f64 * p0) / k as f64;
                p0 = p1;
                p1 = p2;
            }
            dp = n as f64 * (z * p1 - p0) / (z * z - 1.0);
            let dz = p1 / dp;
            z -= dz;
            if dz.abs() < 1e-15 {
                break;
            }
        }
        let weight = 2.0 / ((1.0 - z * z) * dp * dp);
        x[i] = mid - half * z;
        x[n - 1 - i] = mid + half * z;
        w[i] = half * weight;
        w[n - 1 - i] = half * weight;
    }
    (x, w)
}

/// Solves `a·x = b` by Gaussian elimination with partial pivoting (small dense systems).
fn solve(mut a: Vec<Vec<f64>>, mut b: Vec<f64>) -> Vec<f64> {
    let n = b.len();
    for col in 0..n {
        let pivot = (col..n)
            .max_by(|&i, &j| a[i][col].abs().total_cmp(&a[j][col].abs()))
            .unwrap_or(col);
        a.swap(col, pivot);
        b.swap(col, pivot);
        for row in col + 1..n {
            let f = a[row][col] / a[col][col];
            if f != 0.0 {
                let (upper, lower) = a.split_at_mut(row);
                for (x, p) in lower[0][col..].iter_mut().zip(&upper[col][col..]) {
                    *x -= f * p;
                }
                b[row] -= f * b[col];
            }
        }
    }
    let mut x = vec![0.0; n];
    for row in (0..n).rev() {
        let s: f64 = (row + 1..n).map(|c| a[row][c] * x[c]).sum();
        x[row] = (b[row] - s) / a[row][row];
    }
    x
}

/// The expected time between signals in words, for subgroups `interval_s` seconds apart.
pub fn time_between(arl: f64, interval_s: f64) -> String {
    super::reading::duration_words(arl * interval_s)
}
