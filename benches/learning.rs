//! How learned limits behave on a stable process, for each exclusion policy considered:
//! `cargo bench --bench learning` prints median learned sigma / true sigma and the
//! beyond-limits false-alarm rate per point after learning (design 0.27%).

use linewarden::stats::learning::{self, Policy};

fn main() {
    let runs: usize = std::env::var("LEARNING_RUNS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(20_000);
    let policies: [(&str, Policy); 6] = [
        (
            "no exclusion",
            Policy {
                rounds: 0,
                sigmas: 3.0,
                on_dispersion: true,
                max_fraction: 1.0,
            },
        ),
        (
            "desk: 3σ both charts, up to 10 rounds (learning before)",
            learning::DESK,
        ),
        (
            "3σ both charts, 1 round",
            Policy {
                rounds: 1,
                sigmas: 3.0,
                on_dispersion: true,
                max_fraction: 1.0,
            },
        ),
        (
            "3σ location only, up to 10 rounds",
            Policy {
                rounds: 10,
                sigmas: 3.0,
                on_dispersion: false,
                max_fraction: 1.0,
            },
        ),
        (
            "3.5σ both charts, 1 round, cap 10%",
            Policy {
                rounds: 1,
                sigmas: 3.5,
                on_dispersion: true,
                max_fraction: 0.1,
            },
        ),
        (
            "learning now: 4σ both charts, 1 round, cap 10%",
            learning::POLICY,
        ),
    ];
    println!(
        "design false-alarm rate per point: {:.4}%  ({runs} simulated baselines per row, seed 2026)",
        100.0 * learning::design_rate()
    );
    for (name, p) in &policies {
        println!("\n{name}");
        println!(
            "   n    m   median σ̂/σ   false alarms/point: mean  median   (no exclusion: mean)   excluded/baseline"
        );
        for n in [1usize, 3, 5] {
            for m in [20usize, 25, 100] {
                let f = learning::simulate(p, n, m, runs, 2026).expect("simulation");
                println!(
                    "  {n:2}  {m:3}   {:10.4}   {:23.4}%  {:6.4}%   {:19.4}%   {:17.3}",
                    f.median_sigma_ratio,
                    100.0 * f.false_alarm_rate,
                    100.0 * f.median_false_alarm_rate,
                    100.0 * f.false_alarm_rate_no_exclusion,
                    f.mean_excluded
                );
            }
        }
    }
}
