//! Backtest speed on a month of a busy cell, next to simply reading the same archive files, in
//! one run on one disk:
//!
//! 1. generate (once, kept for later runs): an archive of N readings (default 10,000,000) over
//!    1,000 characteristics, recorded as the daemon records them (each reading archived, then
//!    the engine's subgroup results, flags and alerts after it), readings 250 ms apart (about a
//!    month at 10 million);
//! 2. plain read: every segment file read into memory, nothing decoded;
//! 3. decode: every record read and decoded by the archive reader, nothing else;
//! 4. backtest: `linewarden::backtest::run` with the recording configuration (archive read,
//!    decode, engine, comparison; it reproduces the record, which is checked).
//!
//! `cargo bench --bench backtest` (directory: LINEWARDEN_BENCH_DIR, default
//! target/bench-backtest; readings: LINEWARDEN_BENCH_READINGS, default 10000000).

use std::path::{Path, PathBuf};
use std::time::Instant;

use linewarden::archive::reader::{Filter, Reader};
use linewarden::archive::writer::{Writer, WriterConfig};
use linewarden::engine::{Engine, Incoming, Output};
use linewarden::stats::variables::{DispersionKind, dispersion_limits, location_limits};

const CHARACTERISTICS: usize = 1000;
const SUBGROUP: usize = 5;
const SIGMA: f64 = 0.004;

fn limits_file(id: &str) -> String {
    let loc = location_limits(12.0, SIGMA, SUBGROUP);
    let disp = dispersion_limits(DispersionKind::Range, SIGMA, SUBGROUP).unwrap();
    format!(
        r#"format = 1
characteristic = "{id}"
chart = "xbar-r"
subgroup_size = {SUBGROUP}
unit = "mm"
[sigma]
within = {SIGMA}
overall = {SIGMA}
method = "average range / d2"
[location]
center = {}
ucl = {}
lcl = {}
[dispersion]
kind = "range"
center = {}
ucl = {}
lcl = {}
[provenance]
computed_at = "2026-11-01T06:00:00Z"
source = "generated for the backtest benchmark"
tool = "linewarden bench"
subgroups_total = 25
subgroups_used = 25
used = "1-25"
"#,
        loc.center, loc.ucl, loc.lcl, disp.center, disp.ucl, disp.lcl
    )
}

/// The cell: 1,000 characteristics, subgroups of 5, stored limits, the western-electric rules
/// and a reading rule (outside the specification).
fn write_config(dir: &Path) -> PathBuf {
    std::fs::create_dir_all(dir.join("limits")).unwrap();
    let mut cfg = String::from("[daemon]\narchive_dir = \"archive\"\n");
    for i in 0..CHARACTERISTICS {
        let id = format!("c{i:04}");
        std::fs::write(
            dir.join("limits").join(format!("{id}.toml")),
            limits_file(&id),
        )
        .unwrap();
        cfg.push_str(&format!(
            "\n[[characteristic]]\nid = \"{id}\"\nunit = \"mm\"\nlimits = \"limits/{id}.toml\"\n\
             subgroup = {{ size = {SUBGROUP} }}\nspec = {{ lsl = 11.98, usl = 12.02 }}\n\
             [characteristic.rules]\npreset = \"western-electric\"\n\
             [[characteristic.rules.rule]]\nkind = \"outside-spec\"\n"
        ));
    }
    let path = dir.join("cell.toml");
    std::fs::write(&path, cfg).unwrap();
    path
}

/// A cheap deterministic generator (xorshift) and a roughly normal value from it.
struct Noise(u64);

impl Noise {
    fn uniform(&mut self) -> f64 {
        self.0 ^= self.0 << 13;
        self.0 ^= self.0 >> 7;
        self.0 ^= self.0 << 17;
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }

    /// Irwin–Hall: the sum of 12 uniforms less 6, close to a standard normal.
    fn normal(&mut self) -> f64 {
        (0..12).map(|_| self.uniform()).sum::<f64>() - 6.0
    }
}

fn generate(dir: &Path, cfg: &linewarden::config::Config, readings: u64) {
    let _ = std::fs::remove_dir_all(&cfg.archive_dir);
    let (mut w, _) = Writer::open(WriterConfig::new(&cfg.archive_dir)).unwrap();
    let start_ms = 1_793_520_000_000i64; // 2026-11-01
    let mut engine = Engine::new(cfg, start_ms);
    let mut noise = Noise(0x9e37_79b9_7f4a_7c15);
    let mut next_tick = i64::MIN;
    let ids: Vec<String> = (0..CHARACTERISTICS).map(|i| format!("c{i:04}")).collect();
    let put = |w: &mut Writer, outs: Vec<Output>, t: i64| {
        for o in outs {
            if let Output::Record(r) = o {
                w.append(&r, t).unwrap();
            }
        }
    };
    let began = Instant::now();
    for n in 0..readings {
        let t = start_ms + n as i64 * 250;
        if t >= next_tick {
            let outs = engine.tick(t);
            put(&mut w, outs, t);
            next_tick = t + 1000;
        }
        let c = (n as usize / SUBGROUP) % CHARACTERISTICS;
        // Every characteristic drifts up by 1.5 sigma for one hour in each day of its own.
        let hour = (t - start_ms) / 3_600_000;
        let shift = if hour % 24 == (c as i64 % 24) {
            1.5 * SIGMA
        } else {
            0.0
        };
        let inc = Incoming {
            source: "mqtt:cell/gauges".into(),
            characteristic: ids[c].clone(),
            value: 12.0 + shift + SIGMA * noise.normal(),
            unit: Some("mm".into()),
            source_time_ms: Some(t - 40),
            source_time_ignored: false,
            arrival_ms: t,
            part: None,
            source_key: None,
            word: None,
            inspected: None,
            sent: None,
        };
        let seq = w.append(&inc.record(), t).unwrap();
        let outs = engine.accept(seq, &inc);
        put(&mut w, outs, t);
        if n % 100_000 == 99_999 {
            w.flush().unwrap();
        }
        if n % 1_000_000 == 999_999 {
            eprintln!(
                "  generated {} readings in {:.0} s",
                n + 1,
                began.elapsed().as_secs_f64()
            );
        }
    }
    w.flush().unwrap();
    std::fs::write(dir.join("generated"), readings.to_string()).unwrap();
}

fn main() {
    let dir = std::env::var("LINEWARDEN_BENCH_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|_| PathBuf::from("target/bench-backtest"));
    let readings: u64 = std::env::var("LINEWARDEN_BENCH_READINGS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(10_000_000);
    let cfg_path = write_config(&dir);
    let cfg = linewarden::config::load(&cfg_path).unwrap();
    let have = std::fs::read_to_string(dir.join("generated")).ok();
    if have.as_deref() != Some(readings.to_string().as_str()) {
        eprintln!(
            "generating {readings} readings over {CHARACTERISTICS} characteristics in {}",
            cfg.archive_dir.display()
        );
        generate(&dir, &cfg, readings);
    }
    let mut files: Vec<PathBuf> = std::fs::read_dir(&cfg.archive_dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "lwseg"))
        .collect();
    files.sort();
    let bytes: u64 = files.iter().map(|f| f.metadata().unwrap().len()).sum();
    println!(
        "backtest benchmark: {readings} readings over {CHARACTERISTICS} characteristics, {} segments, {:.0} MB, in {}",
        files.len(),
        bytes as f64 / 1e6,
        dir.display()
    );

    // Twice each, interleaved: the first read of a run may come from the disk, later ones from
    // the page cache; the lines say which round.
    for round in 1..=2 {
        let t = Instant::now();
        let mut total = 0usize;
        for f in &files {
            total += std::hint::black_box(std::fs::read(f).unwrap()).len();
        }
        let plain = t.elapsed().as_secs_f64();
        assert_eq!(total as u64, bytes);

        let t = Instant::now();
        let reader = Reader::open(&cfg.archive_dir).unwrap();
        let mut records = 0u64;
        for e in reader.iter(&Filter::default()) {
            std::hint::black_box(e.unwrap());
            records += 1;
        }
        let decode = t.elapsed().as_secs_f64();

        let t = Instant::now();
        let reader = Reader::open(&cfg.archive_dir).unwrap();
        let bt = linewarden::backtest::run(&cfg, &reader, &[], None, None).unwrap();
        let full = t.elapsed().as_secs_f64();
        let seen: u64 = bt.characteristics.iter().map(|c| c.readings).sum();
        assert_eq!(seen, readings);
        let mut signals = 0u64;
        for c in &bt.characteristics {
            for r in &c.rules {
                assert_eq!((r.new, r.gone), (0, 0), "{} {}", c.id, r.rule);
                signals += r.candidate_signals;
            }
        }
        let rate = |s: f64| readings as f64 / s / 1e6;
        println!("round {round}:");
        println!(
            "  plain read of the segment files  {plain:>7.2} s  {:>6.2} M readings/s  {:>7.0} MB/s",
            rate(plain),
            bytes as f64 / plain / 1e6
        );
        println!(
            "  read + decode ({records} records)  {decode:>7.2} s  {:>6.2} M readings/s  ({:.2}x the plain read)",
            rate(decode),
            decode / plain
        );
        println!(
            "  backtest (read, decode, engine)  {full:>7.2} s  {:>6.2} M readings/s  ({:.2}x the plain read; {signals} signals, all matching the record)",
            rate(full),
            full / plain
        );
    }
}
