//! The load side of the MQTT benchmarks in bench/ (run by those scripts; not a test).
//!
//!     bench_mqtt publish --port P --count N --chars C
//!         publishes N readings (QoS 1, JSON) round-robin over C characteristics on
//!         bench/<characteristic>/reading as fast as the broker takes them; prints the rate.
//!     bench_mqtt latency --port P --rate R --seconds S --chars C --prefix PFX
//!         publishes R readings a second; every 50th reading of a characteristic is far beyond
//!         its limits, completing a violating subgroup (individuals); measures the time from
//!         publishing it to the alert's "raised" event arriving on PFX/alerts/#.
//!
//! Readings for characteristic `c0001`..: values around 10.0 with sigma 0.01 (stored limits
//! 9.97 / 10.0 / 10.03 written by the scripts), a violating one at 10.2.

use std::collections::HashMap;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use rumqttc::{AsyncClient, Event, MqttOptions, Packet, QoS};

fn arg(args: &[String], name: &str, default: &str) -> String {
    args.iter()
        .position(|a| a == name)
        .and_then(|i| args.get(i + 1))
        .cloned()
        .unwrap_or_else(|| default.to_string())
}

fn client(port: u16, id: &str) -> (AsyncClient, rumqttc::EventLoop) {
    let mut o = MqttOptions::new(id, "127.0.0.1", port);
    o.set_keep_alive(Duration::from_secs(30));
    o.set_inflight(1000);
    o.set_max_packet_size(1 << 20, 1 << 20);
    AsyncClient::new(o, 10_000)
}

/// An in-control reading: normal, mean 10, sigma 0.01 (what the stored limits say), from a
/// seeded generator, so the rules see the false alarms they are designed to give and no more.
fn value(i: u64) -> f64 {
    use rand::{RngExt, SeedableRng};
    let mut rng = rand::rngs::StdRng::seed_from_u64(i.wrapping_mul(0x9E37_79B9_7F4A_7C15));
    10.0 + 0.01 * rng.sample::<f64, _>(rand_distr::StandardNormal)
}

#[tokio::main(flavor = "multi_thread", worker_threads = 2)]
async fn main() {
    let args: Vec<String> = std::env::args().collect();
    let mode = args.get(1).cloned().unwrap_or_default();
    let port: u16 = arg(&args, "--port", "1883").parse().unwrap();
    let chars: u64 = arg(&args, "--chars", "100").parse().unwrap();
    match mode.as_str() {
        "publish" => {
            let count: u64 = arg(&args, "--count", "100000").parse().unwrap();
            let (c, mut ev) = client(port, "bench-publisher");
            let acked = Arc::new(std::sync::atomic::AtomicU64::new(0));
            let a = acked.clone();
            tokio::spawn(async move {
                loop {
                    match ev.poll().await {
                        Ok(Event::Incoming(Packet::PubAck(_))) => {
                            a.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                        }
                        Ok(_) => {}
                        Err(e) => {
                            eprintln!("publisher: {e}");
                            tokio::time::sleep(Duration::from_millis(100)).await;
                        }
                    }
                }
            });
            let start = Instant::now();
            for i in 0..count {
                let ch = i % chars + 1;
                let payload = format!(r#"{{"v": {:.5}, "part": "p{i}"}}"#, value(i));
                c.publish(
                    format!("bench/c{ch:04}/reading"),
                    QoS::AtLeastOnce,
                    false,
                    payload,
                )
                .await
                .unwrap();
            }
            while acked.load(std::sync::atomic::Ordering::Relaxed) < count {
                tokio::time::sleep(Duration::from_millis(1)).await;
            }
            let s = start.elapsed().as_secs_f64();
            println!(
                "published {count} readings in {s:.3} s: {:.0} readings/s (broker-acknowledged)",
                count as f64 / s
            );
        }
        "latency" => {
            let rate: f64 = arg(&args, "--rate", "1000").parse().unwrap();
            let seconds: f64 = arg(&args, "--seconds", "10").parse().unwrap();
            let prefix = arg(&args, "--prefix", "lw");
            let sent: Arc<Mutex<HashMap<String, Instant>>> = Default::default();
            let lat: Arc<Mutex<Vec<f64>>> = Default::default();
            let (sub, mut sev) = client(port, "bench-hmi");
            let filter = format!("{prefix}/alerts/#");
            sub.subscribe(filter.clone(), QoS::AtLeastOnce)
                .await
                .unwrap();
            let (s2, l2) = (sent.clone(), lat.clone());
            tokio::spawn(async move {
                loop {
                    match sev.poll().await {
                        Ok(Event::Incoming(Packet::Publish(p))) => {
                            let now = Instant::now();
                            let v: serde_json::Value = match serde_json::from_slice(&p.payload) {
                                Ok(v) => v,
                                Err(_) => continue,
                            };
                            // The first message of an alert is its arrival (under heavy load
                            // it may already say cleared: versions are coalesced).
                            // alert id: c0001-<subgroup>-beyond-limits
                            let id = v["alert_id"].as_str().unwrap_or("").to_string();
                            let key = id
                                .rsplitn(2, "-beyond-limits")
                                .last()
                                .unwrap_or("")
                                .to_string();
                            if let Some(t) = s2.lock().unwrap().remove(&key) {
                                l2.lock().unwrap().push((now - t).as_secs_f64() * 1000.0);
                            }
                        }
                        Ok(_) => {}
                        Err(e) => {
                            eprintln!("subscriber: {e}");
                            tokio::time::sleep(Duration::from_millis(100)).await;
                        }
                    }
                }
            });
            tokio::time::sleep(Duration::from_millis(500)).await;
            let (c, mut ev) = client(port, "bench-gauges");
            tokio::spawn(async move {
                loop {
                    if ev.poll().await.is_err() {
                        tokio::time::sleep(Duration::from_millis(100)).await;
                    }
                }
            });
            let total = (rate * seconds) as u64;
            let start = Instant::now();
            let mut counts: HashMap<u64, u64> = HashMap::new();
            for i in 0..total {
                let due = start + Duration::from_secs_f64(i as f64 / rate);
                let now = Instant::now();
                if due > now {
                    tokio::time::sleep_until(due.into()).await;
                }
                let ch = i % chars + 1;
                let n = counts.entry(ch).or_insert(0);
                *n += 1;
                // Skip the first subgroups of a characteristic, then one in 50 is far out.
                let bad = *n > 10 && (*n).is_multiple_of(50);
                let v = if bad { 10.2 } else { value(i) };
                let payload = format!(r#"{{"v": {v:.5}, "part": "p{i}"}}"#);
                if bad {
                    sent.lock()
                        .unwrap()
                        .insert(format!("c{ch:04}-{n}"), Instant::now());
                }
                c.publish(
                    format!("bench/c{ch:04}/reading"),
                    QoS::AtLeastOnce,
                    false,
                    payload,
                )
                .await
                .unwrap();
            }
            let achieved = total as f64 / start.elapsed().as_secs_f64();
            tokio::time::sleep(Duration::from_secs(2)).await;
            let mut l = lat.lock().unwrap().clone();
            let missing = sent.lock().unwrap().len();
            l.sort_by(|a, b| a.partial_cmp(b).unwrap());
            let q = |p: f64| l[((l.len() as f64 - 1.0) * p).round() as usize];
            if l.is_empty() {
                println!("no alerts arrived");
                std::process::exit(1);
            }
            println!(
                "rate {rate:.0}/s (achieved {achieved:.0}/s), {} alerts: latency median {:.3} ms, p99 {:.3} ms, max {:.3} ms; {missing} not seen",
                l.len(),
                q(0.5),
                q(0.99),
                l[l.len() - 1]
            );
        }
        _ => {
            eprintln!("usage: bench_mqtt publish|latency --port P ...");
            std::process::exit(2);
        }
    }
}
