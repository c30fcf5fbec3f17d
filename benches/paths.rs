//! The hot paths besides rule evaluation (benches/rules.rs) and durable appends
//! (benches/archive.rs): control chart constants, subgroup assembly, payload parsing (plain
//! and JSON), and appending a reading record to the archive's buffer.

use std::hint::black_box;

use criterion::{BatchSize, Criterion, Throughput, criterion_group, criterion_main};

use linewarden::archive::Record;
use linewarden::archive::record::PendingReading;
use linewarden::archive::writer::{Writer, WriterConfig};
use linewarden::config::{Grouping, MqttSource, OnTimeout, Payload};
use linewarden::engine::assembly::Assembler;
use linewarden::stats::constants::{factors, factors_uncached};

fn constants(c: &mut Criterion) {
    let mut g = c.benchmark_group("constants");
    g.bench_function("cached n=5", |b| {
        b.iter(|| factors(black_box(5)).unwrap().d2)
    });
    g.bench_function("computed n=5", |b| {
        b.iter(|| factors_uncached(black_box(5)).unwrap().d2)
    });
    g.bench_function("computed n=25", |b| {
        b.iter(|| factors_uncached(black_box(25)).unwrap().d2)
    });
    g.finish();
}

fn assembly(c: &mut Criterion) {
    let mut g = c.benchmark_group("assembly");
    g.throughput(Throughput::Elements(1));
    g.bench_function("by count, n=5", |b| {
        let mut a = Assembler::new(
            Grouping::Count { size: 5 },
            Some(60_000),
            OnTimeout::Evaluate,
        );
        let mut seq = 0u64;
        b.iter(|| {
            seq += 1;
            black_box(a.push(PendingReading {
                seq,
                value: 12.0 + (seq % 7) as f64 * 0.001,
                time_ms: seq as i64,
                part: None,
                inspected: None,
            }))
        })
    });
    g.bench_function("by part, n=5", |b| {
        let mut a = Assembler::new(
            Grouping::Part { size: 5 },
            Some(60_000),
            OnTimeout::Evaluate,
        );
        let mut seq = 0u64;
        b.iter(|| {
            seq += 1;
            black_box(a.push(PendingReading {
                seq,
                value: 12.0,
                time_ms: seq as i64,
                part: Some(format!("P{}", seq / 5)),
                inspected: None,
            }))
        })
    });
    g.finish();
}

fn source(payload: Payload) -> MqttSource {
    MqttSource::on_localhost(payload, "cell4/{characteristic}/measure", None)
}

fn payloads(c: &mut Criterion) {
    let mut g = c.benchmark_group("payload");
    g.throughput(Throughput::Elements(1));
    let plain = source(Payload::Plain);
    g.bench_function("plain", |b| {
        b.iter(|| {
            linewarden::daemon::sources::mqtt::parse(
                &plain,
                black_box("cell4/vb210-bore/measure"),
                black_box(b"12.0031"),
            )
            .unwrap()
        })
    });
    let json = source(Payload::Json {
        value: "/value".into(),
        time: Some("/at".into()),
        characteristic: None,
        part: Some("/part".into()),
        inspected: None,
    });
    let body = br#"{"value": 12.0031, "at": "2026-12-02T08:15:03.250Z", "part": "VB00417"}"#;
    g.bench_function("json (value, RFC 3339 time, part)", |b| {
        b.iter(|| {
            linewarden::daemon::sources::mqtt::parse(
                &json,
                black_box("cell4/vb210-bore/measure"),
                black_box(body),
            )
            .unwrap()
        })
    });
    g.finish();
}

fn archive_append(c: &mut Criterion) {
    let mut g = c.benchmark_group("archive");
    g.throughput(Throughput::Elements(1000));
    let dir = tempfile::tempdir().unwrap();
    let mut cfg = WriterConfig::new(dir.path());
    cfg.flush_interval_ms = 1000;
    let (mut w, _) = Writer::open(cfg).unwrap();
    let rec = Record::ReadingAccepted {
        source: "mqtt:cell4-gateway".into(),
        characteristic: "vb210-bore".into(),
        value: 12.0031,
        unit: None,
        source_time_ms: Some(1_796_198_400_000),
        source_time_ignored: false,
        arrival_ms: 1_796_198_400_003,
        part: Some("VB00417".into()),
        source_key: Some("mqtt:513:5d41402abc4b2a76".into()),
        word: None,
        inspected: None,
    };
    // Encoding, CRC and buffering of 1,000 readings, then one write to the page cache (the
    // fdatasync is what benches/archive.rs measures).
    g.bench_function("append 1000 readings (no fsync)", |b| {
        b.iter_batched(
            || (),
            |_| {
                for i in 0..1000 {
                    w.append(&rec, 1_796_198_400_000 + i).unwrap();
                }
                black_box(w.write_out().unwrap());
            },
            BatchSize::SmallInput,
        )
    });
    g.finish();
}

// Plots off: criterion's charts would need fonts registered with plotters, which this crate
// builds with ab_glyph for its own alert charts.
/// The whole engine per reading: checks, reading rules, assembly into subgroups of 5, the
/// nelson preset with EWMA and CUSUM, alert book, and the records it returns; over 1 and over
/// 1,000 characteristics (round-robin).
fn engine(c: &mut Criterion) {
    let dir = tempfile::tempdir().unwrap();
    let mut g = c.benchmark_group("engine");
    g.throughput(Throughput::Elements(1));
    for chars in [1usize, 1000] {
        let mut text = String::from("[daemon]\narchive_dir = \"archive\"\n");
        for i in 0..chars {
            std::fs::write(
                dir.path().join(format!("c{i}.toml")),
                format!(
                    "format = 1\ncharacteristic = \"c{i}\"\nchart = \"xbar-r\"\nsubgroup_size = 5\nunit = \"mm\"\n[sigma]\nwithin = 0.01\noverall = 0.01\nmethod = \"bench\"\n[location]\ncenter = 10.0\nucl = 10.0134164\nlcl = 9.9865836\n[dispersion]\nkind = \"range\"\ncenter = 0.02326\nucl = 0.04918\nlcl = 0.0\n[provenance]\ncomputed_at = \"2026-12-01T00:00:00Z\"\nsource = \"bench\"\ntool = \"bench\"\nsubgroups_total = 25\nsubgroups_used = 25\nused = \"1-25\"\n"
                ),
            )
            .unwrap();
            text.push_str(&format!(
                "[[characteristic]]\nid = \"c{i}\"\nunit = \"mm\"\nlimits = \"c{i}.toml\"\nsubgroup = {{ size = 5 }}\n[characteristic.rules]\npreset = \"nelson\"\n[[characteristic.rules.rule]]\nkind = \"ewma\"\nlambda = 0.2\nwidth = 2.962\n[[characteristic.rules.rule]]\nkind = \"cusum\"\nk = 0.5\nh = 5.0\n"
            ));
        }
        let path = dir.path().join(format!("cell{chars}.toml"));
        std::fs::write(&path, &text).unwrap();
        let cfg = linewarden::config::load(&path).unwrap();
        let mut e = linewarden::engine::Engine::new(&cfg, 0);
        let ids: Vec<String> = (0..chars).map(|i| format!("c{i}")).collect();
        // In-control readings: normal, mean 10, sigma 0.01 (what the limits say).
        let values: Vec<f64> = {
            use rand::{RngExt, SeedableRng};
            let mut rng = rand::rngs::StdRng::seed_from_u64(11);
            (0..4096)
                .map(|_| 10.0 + 0.01 * rng.sample::<f64, _>(rand_distr::StandardNormal))
                .collect()
        };
        let mut seq = 0u64;
        g.bench_function(format!("accept, {chars} characteristic(s)"), |b| {
            b.iter(|| {
                seq += 1;
                let inc = linewarden::engine::Incoming {
                    source: "bench".into(),
                    characteristic: ids[(seq as usize / 5) % chars].clone(),
                    value: values[seq as usize % values.len()],
                    unit: None,
                    source_time_ms: None,
                    source_time_ignored: false,
                    arrival_ms: seq as i64,
                    part: None,
                    source_key: None,
                    word: None,
                    inspected: None,
                    sent: None,
                };
                black_box(e.accept(seq, &inc))
            })
        });
    }
    g.finish();
}

criterion_group! {
    name = benches;
    config = Criterion::default().without_plots();
    targets = constants, assembly, payloads, archive_append, engine
}
criterion_main!(benches);
