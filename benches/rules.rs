//! Rule evaluation speed: the `nelson` preset plus EWMA and CUSUM, on one characteristic and on
//! 10,000 characteristics evaluated round-robin (state of each in its own evaluator).

use criterion::{BatchSize, Criterion, Throughput, criterion_group, criterion_main};
use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use rand_distr::StandardNormal;

use linewarden::rules::config::{Rule, RuleKind, RuleSet};
use linewarden::rules::point::{ChartBasis, Plotted, PointEvaluator};
use linewarden::rules::{Preset, Severity};

fn rule_set() -> RuleSet {
    let mut set = RuleSet::preset(Preset::Nelson);
    set.rules.push(Rule {
        id: "ewma".into(),
        severity: Severity::Warn,
        kind: RuleKind::Ewma {
            lambda: 0.2,
            width: 2.962,
        },
    });
    set.rules.push(Rule {
        id: "cusum".into(),
        severity: Severity::Warn,
        kind: RuleKind::Cusum {
            k: 0.5,
            h: 5.0,
            head_start: 0.0,
            restart_on_acknowledge: true,
        },
    });
    set
}

fn points(count: usize) -> Vec<Plotted> {
    let mut rng = StdRng::seed_from_u64(7);
    (0..count)
        .map(|i| {
            let z: f64 = rng.sample(StandardNormal);
            let r: f64 = rng.sample::<f64, _>(StandardNormal).abs();
            Plotted {
                number: i as u64,
                time_ms: i as i64 * 1000,
                n: 1,
                mean: z,
                dispersion: Some(r),
                attribute: None,
            }
        })
        .collect()
}

fn bench(c: &mut Criterion) {
    let set = rule_set();
    let pts = points(100_000);
    let mut g = c.benchmark_group("rules");
    g.throughput(Throughput::Elements(pts.len() as u64));
    g.bench_function("nelson+ewma+cusum, 1 characteristic", |b| {
        b.iter_batched_ref(
            || PointEvaluator::new(&set, ChartBasis::standard()),
            |e| {
                let mut fired = 0usize;
                for p in &pts {
                    fired += e.evaluate(p).len();
                }
                fired
            },
            BatchSize::LargeInput,
        )
    });
    g.bench_function(
        "nelson+ewma+cusum, 10000 characteristics round-robin",
        |b| {
            b.iter_batched_ref(
                || {
                    (0..10_000)
                        .map(|_| PointEvaluator::new(&set, ChartBasis::standard()))
                        .collect::<Vec<_>>()
                },
                |evals| {
                    let mut fired = 0usize;
                    for (i, p) in pts.iter().enumerate() {
                        fired += evals[i % 10_000].evaluate(p).len();
                    }
                    fired
                },
                BatchSize::LargeInput,
            )
        },
    );
    g.bench_function("step only (no messages), 1 characteristic", |b| {
        b.iter_batched_ref(
            || PointEvaluator::new(&set, ChartBasis::standard()),
            |e| {
                let mut fired = 0u64;
                for p in &pts {
                    fired += u64::from(e.step(p.mean, 3.0, -3.0).count_ones());
                }
                fired
            },
            BatchSize::LargeInput,
        )
    });
    g.finish();
}

// Plots off: criterion's charts would need fonts registered with plotters, which this crate
// builds with ab_glyph for its own alert charts.
criterion_group! {
    name = benches;
    config = Criterion::default().without_plots();
    targets = bench
}
criterion_main!(benches);
