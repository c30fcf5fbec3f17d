//! Alerts reaching people through real peers: Mosquitto (stopped and restarted while an alert
//! is raised), an SMTP server (aiosmtpd, down then up, and a restart with the email pending),
//! Modbus TCP servers (tokio-modbus in this process, and pymodbus) driving a stack light, the
//! control socket (`linewarden status` / `linewarden ack`) and acknowledgement over MQTT, and a
//! flood of violations that must give one alert and a bounded number of emails.
//!
//! CI installs Mosquitto, aiosmtpd and pymodbus and sets LINEWARDEN_REQUIRE_MOSQUITTO=1 and
//! LINEWARDEN_REQUIRE_PYTHON_PEERS=1, so none of these can silently skip there.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use linewarden::alerts::AlertEvent;
use linewarden::archive::Record;
use linewarden::archive::reader::{Filter, Reader};

mod common;
use common::BORE_LIMITS;
use common::peers::{
    Daemon, PersistentMosquitto, cli, free_port, python_peer, wait_for_port, wait_until,
};

/// A replay feed: subgroups of 4 around each mean, the first reading at `start_ms`, one every
/// `step_ms`.
fn feed(path: &Path, means: &[f64], start_ms: i64, step_ms: i64) {
    let mut text = String::new();
    let mut t = start_ms;
    for (i, m) in means.iter().enumerate() {
        for (j, d) in [-0.001, 0.001, -0.0005, 0.0005].iter().enumerate() {
            text.push_str(&format!(
                "{{\"t_ms\": {t}, \"characteristic\": \"bore\", \"value\": {}, \"part\": \"P{}\"}}\n",
                m + d,
                i * 4 + j
            ));
            t += step_ms;
        }
    }
    std::fs::write(path, text).unwrap();
}

/// Subgroups 1-3 on the centre, 4 beyond the upper limit (a stop-level alert), 5-8 on the
/// centre again (the condition is gone).
const MEANS: [f64; 8] = [12.0, 12.0, 12.0, 12.010, 12.0, 12.0, 12.0, 12.0];
const ALERT: &str = "bore-4-beyond-limits-up";

/// A cell: the bore (stored limits, Western Electric rules), a replay feed, an empty watched
/// folder that keeps the daemon running after the replay, a control socket, and `outputs`.
fn cell(dir: &Path, feed_file: Option<&str>, outputs: &str) -> PathBuf {
    std::fs::write(dir.join("bore.toml"), BORE_LIMITS).unwrap();
    std::fs::create_dir_all(dir.join("inbox")).unwrap();
    let replay = feed_file
        .map(|f| {
            format!("[[source]]\nid = \"feed\"\nkind = \"replay\"\nfile = \"{f}\"\nspeed = 1\n")
        })
        .unwrap_or_default();
    let text = format!(
        r#"[daemon]
archive_dir = "archive"
flush_interval_ms = 2

[control]
socket = "control.sock"
mode = "0600"

[[characteristic]]
id = "bore"
name = "Bore diameter"
unit = "mm"
limits = "bore.toml"
subgroup = {{ size = 4 }}
reaction_plan = "Check the boring insert for wear"
[characteristic.rules]
preset = "western-electric"

{replay}
[[source]]
id = "inbox"
kind = "folder"
path = "inbox"
rows = "per-reading"
characteristic_column = "c"
value_column = "v"

{outputs}
"#
    );
    let p = dir.join(if feed_file.is_some() {
        "cell.toml"
    } else {
        "cell-nofeed.toml"
    });
    std::fs::write(&p, text).unwrap();
    p
}

/// Every alert event in the archive: (alert id, event).
fn alert_events(archive: &Path) -> Vec<(String, AlertEvent)> {
    let r = Reader::open(archive).unwrap();
    r.iter(&Filter::default())
        .flatten()
        .filter_map(|e| match e.record {
            Record::Alert {
                alert_id, event, ..
            } => Some((alert_id, event)),
            _ => None,
        })
        .collect()
}

fn sock(dir: &Path) -> String {
    dir.join("control.sock").display().to_string()
}

/// Messages an MQTT subscriber received: (topic, payload, retained).
type Inbox = Arc<Mutex<Vec<(String, String, bool)>>>;

/// A persistent-session subscriber to `filter` (an HMI, say), in its own runtime.
fn subscriber(
    rt: &tokio::runtime::Runtime,
    port: u16,
    filter: &str,
) -> (rumqttc::AsyncClient, Inbox) {
    let mut o = rumqttc::MqttOptions::new("test-hmi", "127.0.0.1", port);
    o.set_keep_alive(Duration::from_secs(5));
    o.set_clean_session(false);
    // Room for the oversized commands a hostile HMI may send.
    o.set_max_packet_size(1 << 20, 1 << 20);
    let (client, mut ev) = rumqttc::AsyncClient::new(o, 1000);
    let inbox: Inbox = Default::default();
    let (sink, filter, c) = (inbox.clone(), filter.to_string(), client.clone());
    rt.spawn(async move {
        loop {
            match ev.poll().await {
                Ok(rumqttc::Event::Incoming(rumqttc::Packet::ConnAck(_))) => {
                    let _ = c.try_subscribe(filter.clone(), rumqttc::QoS::AtLeastOnce);
                }
                Ok(rumqttc::Event::Incoming(rumqttc::Packet::Publish(p))) => {
                    sink.lock().unwrap().push((
                        p.topic.clone(),
                        String::from_utf8_lossy(&p.payload).into_owned(),
                        p.retain,
                    ));
                }
                Ok(_) => {}
                Err(_) => tokio::time::sleep(Duration::from_millis(100)).await,
            }
        }
    });
    (client, inbox)
}

fn runtime() -> tokio::runtime::Runtime {
    tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap()
}

fn json(s: &str) -> serde_json::Value {
    serde_json::from_str(s).unwrap_or_else(|e| panic!("not JSON ({e}): {s}"))
}

#[test]
fn mqtt_alerts_survive_a_broker_outage_and_are_acknowledged_from_the_hmi() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let Some(mut broker) = PersistentMosquitto::new(d) else {
        return;
    };
    let rt = runtime();
    let (hmi, inbox) = subscriber(&rt, broker.port, "cell4/#");
    wait_until("the HMI to subscribe", Duration::from_secs(10), || {
        std::thread::sleep(Duration::from_millis(200));
        true
    });
    // The violating subgroup completes about 4 s after the start.
    feed(&d.join("feed.jsonl"), &MEANS, 1000, 200);
    let cfg = cell(
        d,
        Some("feed.jsonl"),
        &format!(
            "[[output]]\nid = \"hmi\"\nkind = \"mqtt\"\nbroker = \"mqtt://127.0.0.1:{}\"\ntopic_prefix = \"cell4/linewarden\"\n",
            broker.port
        ),
    );
    let daemon = Daemon::start(&cfg, &d.join("daemon.log"));
    wait_until(
        "the retained online status",
        Duration::from_secs(10),
        || {
            inbox
                .lock()
                .unwrap()
                .iter()
                .any(|(t, p, _)| t == "cell4/linewarden/status" && p.contains("online"))
        },
    );
    broker.stop();
    daemon.wait_log(
        "ALERT STOP bore-4-beyond-limits-up",
        1,
        Duration::from_secs(20),
    );
    daemon.wait_log("lost the broker", 1, Duration::from_secs(10));
    std::thread::sleep(Duration::from_millis(500));
    broker.start();
    let alert_topic = format!("cell4/linewarden/alerts/bore/{ALERT}");
    wait_until(
        "the alert after the outage",
        Duration::from_secs(30),
        || {
            inbox
                .lock()
                .unwrap()
                .iter()
                .any(|(t, _, _)| t == &alert_topic)
        },
    );
    // The technician acknowledges from the HMI.
    rt.block_on(hmi.publish(
        "cell4/linewarden/command/ack",
        rumqttc::QoS::AtLeastOnce,
        false,
        format!(r#"{{"alert": "{ALERT}", "by": "R. Tech", "note": "insert changed"}}"#),
    ))
    .unwrap();
    wait_until(
        "the acknowledgement's result",
        Duration::from_secs(10),
        || {
            inbox
                .lock()
                .unwrap()
                .iter()
                .any(|(t, p, _)| t == "cell4/linewarden/command/result" && p.contains(ALERT))
        },
    );
    wait_until("the cleared alert", Duration::from_secs(10), || {
        inbox
            .lock()
            .unwrap()
            .iter()
            .any(|(t, p, _)| t == &alert_topic && json(p)["status"] == "cleared")
    });
    // The CLI sees the same, and refuses a second acknowledgement.
    let (ok, out, err) = cli(&["status", "--socket", &sock(d), "--json"]);
    assert!(ok, "{err}");
    let st = json(&out);
    let a = st["alerts"]
        .as_array()
        .unwrap()
        .iter()
        .find(|a| a["id"] == ALERT)
        .unwrap()
        .clone();
    assert_eq!(a["status"], "cleared");
    assert_eq!(a["ack"]["by"], "R. Tech");
    assert_eq!(a["reaction_plan"], "Check the boring insert for wear");
    let (ok, _, err) = cli(&["ack", ALERT, "--by", "K. Lead", "--socket", &sock(d)]);
    assert!(!ok && err.contains("already cleared"), "{err}");
    wait_until(
        "the retained state back in control",
        Duration::from_secs(10),
        || {
            inbox
                .lock()
                .unwrap()
                .iter()
                .rev()
                .find(|(t, _, _)| t == "cell4/linewarden/characteristics/bore/state")
                .is_some_and(|(_, p, _)| json(p)["state"] == "in-control")
        },
    );
    daemon.stop();
    wait_until("the stopped status", Duration::from_secs(10), || {
        inbox
            .lock()
            .unwrap()
            .iter()
            .any(|(t, p, _)| t == "cell4/linewarden/status" && p.contains("stopped"))
    });
    let got = inbox.lock().unwrap().clone();
    let result = got
        .iter()
        .find(|(t, _, _)| t == "cell4/linewarden/command/result")
        .unwrap();
    let r = json(&result.1);
    assert_eq!(
        (r["ok"].as_bool(), r["acknowledged"][0].as_str()),
        (Some(true), Some(ALERT))
    );
    // Each version of the alert arrived exactly once, the first being the raise.
    let mut versions: BTreeMap<u64, usize> = BTreeMap::new();
    let mut first_event = None;
    for (t, p, _) in &got {
        if t == &alert_topic {
            let v = json(p);
            first_event.get_or_insert(v["event"].as_str().unwrap().to_string());
            *versions.entry(v["version"].as_u64().unwrap()).or_default() += 1;
        }
    }
    assert_eq!(first_event.as_deref(), Some("raised"));
    assert!(
        versions.values().all(|n| *n == 1),
        "a version arrived twice: {versions:?}"
    );
    // The retained state of the characteristic is there for a newcomer.
    let state = got
        .iter()
        .rev()
        .find(|(t, _, _)| t == "cell4/linewarden/characteristics/bore/state")
        .expect("a retained state");
    assert_eq!(json(&state.1)["state"], "in-control");
    // Where its limits come from (a study's file here; learned ones say "provisional").
    assert_eq!(
        json(&state.1)["limits"]["state"],
        "stored",
        "{}",
        json(&state.1)
    );
    // The archive has the whole life: raised, gone, acknowledged, cleared, delivered.
    let events = alert_events(&d.join("archive"));
    let kinds: Vec<&str> = events
        .iter()
        .filter(|(id, _)| id == ALERT)
        .map(|(_, e)| match e {
            AlertEvent::Raised { .. } => "raised",
            AlertEvent::Gone { .. } => "gone",
            AlertEvent::Acknowledged { .. } => "acknowledged",
            AlertEvent::Cleared { .. } => "cleared",
            AlertEvent::Delivered { .. } => "delivered",
            _ => "other",
        })
        .filter(|k| *k != "delivered")
        .collect();
    assert_eq!(kinds, ["raised", "gone", "acknowledged", "cleared"]);
    assert!(events.iter().any(|(id, e)| id == ALERT
        && matches!(e, AlertEvent::Delivered { output, .. } if output == "hmi")));
}

/// A CA and a certificate for localhost signed by it, made with openssl.
fn certificates(dir: &Path) -> Option<(PathBuf, PathBuf, PathBuf)> {
    let run = |args: &[&str]| {
        std::process::Command::new("openssl")
            .args(args)
            .current_dir(dir)
            .output()
            .map(|o| o.status.success())
            .unwrap_or(false)
    };
    std::fs::write(
        dir.join("leaf.ext"),
        "subjectAltName=DNS:localhost\nbasicConstraints=CA:FALSE\n",
    )
    .unwrap();
    let ok = run(&[
        "req",
        "-x509",
        "-newkey",
        "rsa:2048",
        "-nodes",
        "-keyout",
        "ca.key",
        "-out",
        "ca.pem",
        "-days",
        "2",
        "-subj",
        "/CN=linewarden test CA",
    ]) && run(&[
        "req",
        "-newkey",
        "rsa:2048",
        "-nodes",
        "-keyout",
        "server.key",
        "-out",
        "server.csr",
        "-subj",
        "/CN=localhost",
    ]) && run(&[
        "x509",
        "-req",
        "-in",
        "server.csr",
        "-CA",
        "ca.pem",
        "-CAkey",
        "ca.key",
        "-CAcreateserial",
        "-out",
        "server.pem",
        "-days",
        "2",
        "-extfile",
        "leaf.ext",
    ]);
    ok.then(|| {
        (
            dir.join("ca.pem"),
            dir.join("server.pem"),
            dir.join("server.key"),
        )
    })
}

/// Messages aiosmtpd saved into its mailbox (a Maildir).
fn mailbox(dir: &Path) -> Vec<Vec<u8>> {
    let mut out = Vec::new();
    for sub in ["new", "cur"] {
        for e in std::fs::read_dir(dir.join(sub))
            .into_iter()
            .flatten()
            .flatten()
        {
            out.push(std::fs::read(e.path()).unwrap());
        }
    }
    out
}

fn smtp_server(
    dir: &Path,
    port: u16,
    tls: Option<&(PathBuf, PathBuf, PathBuf)>,
) -> Option<std::process::Child> {
    let maildir = dir.join("maildir");
    let listen = format!("localhost:{port}");
    let maildir_s = maildir.display().to_string();
    let mut args = vec!["-m", "aiosmtpd", "-n", "-l", &listen];
    let (cert, key);
    if let Some((_, c, k)) = tls {
        cert = c.display().to_string();
        key = k.display().to_string();
        args.extend(["--tlscert", &cert, "--tlskey", &key]);
    }
    args.extend(["-c", "aiosmtpd.handlers.Mailbox", &maildir_s]);
    let child = python_peer("aiosmtpd", &args, &dir.join("smtp.log"))?;
    wait_for_port(port);
    Some(child)
}

#[test]
fn email_waits_for_the_mail_server_and_carries_the_chart() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let Some(certs) = certificates(d) else {
        panic!("openssl could not make the test certificates");
    };
    let port = free_port();
    feed(&d.join("feed.jsonl"), &MEANS, 0, 20);
    let cfg = cell(
        d,
        Some("feed.jsonl"),
        &format!(
            "[[output]]\nid = \"quality\"\nkind = \"email\"\nsmtp = \"smtp://localhost:{port}\"\nca_file = \"{}\"\nfrom = \"linewarden cell 4 <linewarden@cell4.example>\"\nto = [\"quality@cell4.example\"]\ndigest_s = 1\n",
            certs.0.display()
        ),
    );
    // The mail server is down when the alert is raised ...
    let daemon = Daemon::start(&cfg, &d.join("daemon.log"));
    daemon.wait_log(
        "ALERT STOP bore-4-beyond-limits-up",
        1,
        Duration::from_secs(20),
    );
    daemon.wait_log("cannot send mail", 1, Duration::from_secs(20));
    // ... and comes up later, speaking STARTTLS with a certificate from our own CA.
    let Some(mut smtp) = smtp_server(d, port, Some(&certs)) else {
        return;
    };
    wait_until("the email", Duration::from_secs(90), || {
        !mailbox(&d.join("maildir")).is_empty()
    });
    daemon.stop();
    let _ = smtp.kill();
    let mails = mailbox(&d.join("maildir"));
    assert_eq!(mails.len(), 1, "one alert, one email");
    let m = mailparse::parse_mail(&mails[0]).unwrap();
    let subject = m
        .headers
        .iter()
        .find(|h| h.get_key() == "Subject")
        .unwrap()
        .get_value();
    assert!(subject.contains("STOP bore"), "{subject}");
    let id = m
        .headers
        .iter()
        .find(|h| h.get_key() == "Message-ID")
        .unwrap()
        .get_value();
    assert!(id.contains(ALERT), "{id}");
    // multipart/alternative: text/plain, then multipart/related with the HTML and the PNG.
    assert_eq!(m.ctype.mimetype, "multipart/alternative");
    let text = m.subparts[0].get_body().unwrap();
    assert!(
        text.contains("beyond") && text.contains("Check the boring insert for wear"),
        "{text}"
    );
    assert!(text.contains(&format!("linewarden ack {ALERT}")), "{text}");
    let related = &m.subparts[1];
    assert_eq!(related.ctype.mimetype, "multipart/related");
    let html = related.subparts[0].get_body().unwrap();
    assert!(html.contains("cid:chart-bore@linewarden"), "{html}");
    let png = related.subparts[1].get_body_raw().unwrap();
    assert_eq!(related.subparts[1].ctype.mimetype, "image/png");
    let decoder = png::Decoder::new(std::io::Cursor::new(png));
    let reader = decoder.read_info().unwrap();
    assert_eq!((reader.info().width, reader.info().height), (860, 560));
    assert!(html.contains("location above, spread below"), "{html}");
}

#[test]
fn a_pending_email_goes_out_after_a_restart() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let port = free_port();
    feed(&d.join("feed.jsonl"), &MEANS, 0, 20);
    let out = format!(
        "[[output]]\nid = \"quality\"\nkind = \"email\"\nsmtp = \"smtp+plain://localhost:{port}\"\nfrom = \"linewarden@cell4.example\"\nto = [\"quality@cell4.example\"]\ndigest_s = 0\n"
    );
    let cfg = cell(d, Some("feed.jsonl"), &out);
    let daemon = Daemon::start(&cfg, &d.join("daemon.log"));
    daemon.wait_log("cannot send mail", 1, Duration::from_secs(20));
    daemon.stop();
    let Some(mut smtp) = smtp_server(d, port, None) else {
        return;
    };
    // Restart without the feed: only the pending delivery can produce an email.
    let cfg2 = cell(d, None, &out);
    let daemon = Daemon::start(&cfg2, &d.join("daemon2.log"));
    daemon.wait_log(
        "alert(s) still open from before the restart",
        1,
        Duration::from_secs(10),
    );
    wait_until("the pending email", Duration::from_secs(30), || {
        !mailbox(&d.join("maildir")).is_empty()
    });
    daemon.stop();
    let _ = smtp.kill();
    assert_eq!(mailbox(&d.join("maildir")).len(), 1);
    let events = alert_events(&d.join("archive"));
    assert!(events.iter().any(|(id, e)| id == ALERT
        && matches!(e, AlertEvent::Delivered { output, .. } if output == "quality")));
}

#[test]
fn a_flood_of_violations_gives_one_alert_per_rule_and_few_emails() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let port = free_port();
    let Some(mut smtp) = smtp_server(d, port, None) else {
        return;
    };
    // 1,000 subgroups beyond the upper limit, as fast as the daemon takes them.
    let mut means = vec![12.0; 3];
    means.extend(std::iter::repeat_n(12.010, 1000));
    feed(&d.join("feed.jsonl"), &means, 0, 0);
    let cfg = cell(
        d,
        Some("feed.jsonl"),
        &format!(
            "[[output]]\nid = \"quality\"\nkind = \"email\"\nsmtp = \"smtp+plain://localhost:{port}\"\nfrom = \"linewarden@cell4.example\"\nto = [\"quality@cell4.example\"]\ndigest_s = 2\nmax_per_hour = 5\n"
        ),
    );
    let daemon = Daemon::start(&cfg, &d.join("daemon.log"));
    wait_until("1,000 repeats", Duration::from_secs(60), || {
        let (ok, out, _) = cli(&["status", "--socket", &sock(d), "--json"]);
        ok && json(&out)["alerts"].as_array().is_some_and(|a| {
            a.iter()
                .any(|a| a["rule"] == "beyond-limits" && a["count"] == 1000)
        })
    });
    wait_until("the email", Duration::from_secs(30), || {
        !mailbox(&d.join("maildir")).is_empty()
    });
    std::thread::sleep(Duration::from_secs(3));
    daemon.stop();
    let _ = smtp.kill();
    let events = alert_events(&d.join("archive"));
    let mut raised: BTreeMap<String, usize> = BTreeMap::new();
    for (_, e) in &events {
        if let AlertEvent::Raised { rule, .. } = e {
            *raised.entry(rule.clone()).or_default() += 1;
        }
    }
    assert_eq!(raised.get("beyond-limits"), Some(&1), "{raised:?}");
    assert!(
        raised.values().all(|n| *n == 1),
        "one alert per rule: {raised:?}"
    );
    let mails = mailbox(&d.join("maildir")).len();
    assert!(
        mails >= 1 && mails <= raised.len(),
        "{mails} emails for {} alerts",
        raised.len()
    );
}

/// A Modbus TCP server in this process: coils 0-15, written and read by address.
mod coil_server {
    use std::future;
    use std::sync::{Arc, Mutex};

    use tokio_modbus::prelude::*;
    use tokio_modbus::server::tcp::{Server, accept_tcp_connection};

    pub type Coils = Arc<Mutex<[bool; 16]>>;

    struct Relay {
        coils: Coils,
    }

    impl tokio_modbus::server::Service for Relay {
        type Request = SlaveRequest<'static>;
        type Response = Response;
        type Exception = ExceptionCode;
        type Future = future::Ready<Result<Response, ExceptionCode>>;

        fn call(&self, req: Self::Request) -> Self::Future {
            let mut c = self.coils.lock().unwrap();
            let r = match req.request {
                Request::WriteSingleCoil(a, v) if (a as usize) < 16 => {
                    c[a as usize] = v;
                    Ok(Response::WriteSingleCoil(a, v))
                }
                Request::ReadCoils(a, n) if (a as usize + n as usize) <= 16 => Ok(
                    Response::ReadCoils(c[a as usize..(a + n) as usize].to_vec()),
                ),
                _ => Err(ExceptionCode::IllegalDataAddress),
            };
            future::ready(r)
        }
    }

    pub async fn serve(port: u16, coils: Coils) {
        let listener = tokio::net::TcpListener::bind(("127.0.0.1", port))
            .await
            .unwrap();
        let server = Server::new(listener);
        let on_connected = move |stream, addr| {
            let coils = coils.clone();
            async move {
                accept_tcp_connection(stream, addr, move |_| {
                    Ok(Some(Relay {
                        coils: coils.clone(),
                    }))
                })
            }
        };
        let _ = server
            .serve(&on_connected, |e| eprintln!("modbus server: {e}"))
            .await;
    }
}

/// Reads coils 0-3 (red, yellow, green, buzzer) from a Modbus TCP server.
fn read_coils(rt: &tokio::runtime::Runtime, port: u16) -> Option<[bool; 4]> {
    use tokio_modbus::prelude::*;
    rt.block_on(async {
        let mut ctx = tcp::connect_slave(format!("127.0.0.1:{port}").parse().unwrap(), Slave(1))
            .await
            .ok()?;
        let c = ctx.read_coils(0, 4).await.ok()?.ok()?;
        Some([c[0], c[1], c[2], c[3]])
    })
}

const RED: [bool; 4] = [true, false, false, true];
const GREEN: [bool; 4] = [false, false, true, false];
const OFF: [bool; 4] = [false; 4];

/// Green while in control, red and buzzer on a stop alert, green again once acknowledged and
/// gone, off at shutdown: against whichever Modbus TCP server listens on `port`.
fn light_follows_the_alerts(d: &Path, port: u16, rt: &tokio::runtime::Runtime) {
    feed(&d.join("feed.jsonl"), &MEANS, 1500, 150);
    let cfg = cell(
        d,
        Some("feed.jsonl"),
        &format!(
            "[[output]]\nid = \"light\"\nkind = \"stack-light\"\nmodbus = \"tcp://127.0.0.1:{port}\"\ncoils = {{ red = 0, yellow = 1, green = 2, buzzer = 3 }}\nrefresh_ms = 200\n"
        ),
    );
    let daemon = Daemon::start(&cfg, &d.join("daemon.log"));
    let log = d.join("daemon.log");
    let coils_are = |want: [bool; 4], what: &str| {
        let start = Instant::now();
        loop {
            let got = read_coils(rt, port);
            if got == Some(want) {
                return;
            }
            assert!(
                start.elapsed() < Duration::from_secs(20),
                "{what}: coils {got:?}, want {want:?}\n{}",
                std::fs::read_to_string(&log).unwrap_or_default()
            );
            std::thread::sleep(Duration::from_millis(50));
        }
    };
    coils_are(GREEN, "in control");
    coils_are(RED, "a stop-level alert");
    daemon.wait_log("condition is gone", 1, Duration::from_secs(20));
    let (ok, out, err) = cli(&["ack", "bore", "--by", "R. Tech", "--socket", &sock(d)]);
    assert!(ok, "{err}");
    assert!(out.contains(ALERT), "{out}");
    coils_are(GREEN, "acknowledged and gone");
    let (ok, out, _) = cli(&["status", "--socket", &sock(d)]);
    assert!(
        ok && out.contains("light: normal") && out.contains("bore"),
        "{out}"
    );
    daemon.stop();
    coils_are(OFF, "after shutdown: not monitoring");
}

#[test]
fn a_stack_light_on_a_tokio_modbus_server() {
    let dir = tempfile::tempdir().unwrap();
    let port = free_port();
    let rt = runtime();
    let coils: coil_server::Coils = Default::default();
    rt.spawn(coil_server::serve(port, coils));
    wait_for_port(port);
    light_follows_the_alerts(dir.path(), port, &rt);
}

#[test]
fn a_stack_light_on_a_pymodbus_server() {
    let dir = tempfile::tempdir().unwrap();
    let port = free_port();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/peers/modbus_server.py");
    let Some(mut server) = python_peer(
        "pymodbus",
        &[script.to_str().unwrap(), &port.to_string()],
        &dir.path().join("pymodbus.log"),
    ) else {
        return;
    };
    wait_for_port(port);
    let rt = runtime();
    light_follows_the_alerts(dir.path(), port, &rt);
    let _ = server.kill();
}

#[test]
fn an_unacknowledged_alert_escalates_once_to_the_escalation_outputs() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    feed(&d.join("feed.jsonl"), &MEANS, 0, 20);
    let cfg = cell(
        d,
        Some("feed.jsonl"),
        "[alerts]\nstop = { escalate_after = \"10 s\" }\nescalate_to = [\"lead\"]\n\n[[output]]\nid = \"console\"\nkind = \"log\"\n\n[[output]]\nid = \"lead\"\nkind = \"log\"\n",
    );
    let daemon = Daemon::start(&cfg, &d.join("daemon.log"));
    daemon.wait_log(
        "ALERT STOP bore-4-beyond-limits-up",
        1,
        Duration::from_secs(20),
    );
    daemon.wait_log(
        &format!("alert {ALERT} escalated"),
        1,
        Duration::from_secs(30),
    );
    std::thread::sleep(Duration::from_millis(500));
    daemon.stop();
    let events = alert_events(&d.join("archive"));
    let at = |pred: &dyn Fn(&AlertEvent) -> bool| {
        events
            .iter()
            .position(|(id, e)| id == ALERT && pred(e))
            .unwrap_or_else(|| panic!("missing event in {events:?}"))
    };
    let escalated = at(&|e| matches!(e, AlertEvent::Escalated { .. }));
    let to_console =
        at(&|e| matches!(e, AlertEvent::Delivered { output, .. } if output == "console"));
    let to_lead = at(&|e| matches!(e, AlertEvent::Delivered { output, .. } if output == "lead"));
    assert!(
        to_console < escalated,
        "the console hears of the alert when it is raised"
    );
    assert!(
        escalated < to_lead,
        "the escalation output hears of it only once escalated"
    );
    let n = events
        .iter()
        .filter(|(id, e)| id == ALERT && matches!(e, AlertEvent::Escalated { .. }))
        .count();
    assert_eq!(n, 1, "escalated once");
}

/// Learned limits approved from the HMI over MQTT, as from the command line: a wrong
/// characteristic, a malformed command and an oversized one are each answered with the reason
/// on the result topic and change nothing; the right one is recorded in the limits file with
/// the approver.
#[test]
fn learned_limits_are_approved_over_mqtt_and_bad_commands_are_answered() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let Some(broker) = PersistentMosquitto::new(d) else {
        return;
    };
    let rt = runtime();
    let (hmi, inbox) = subscriber(&rt, broker.port, "cell4/#");
    std::fs::create_dir_all(d.join("inbox")).unwrap();
    let text = format!(
        r#"[daemon]
archive_dir = "archive"
flush_interval_ms = 2

[[characteristic]]
id = "face"
unit = "mm"
limits = "limits/face.toml"
subgroup = {{ size = 3 }}
learning = {{ subgroups = 20 }}

[[source]]
id = "cmm"
kind = "folder"
path = "inbox"
rows = "per-part"
columns = {{ "Face" = "face" }}

[[output]]
id = "hmi"
kind = "mqtt"
broker = "mqtt://127.0.0.1:{}"
topic_prefix = "cell4/linewarden"
"#,
        broker.port
    );
    std::fs::write(d.join("cell.toml"), text).unwrap();
    let daemon = Daemon::start(&d.join("cell.toml"), &d.join("daemon.log"));
    wait_until("the online status", Duration::from_secs(10), || {
        inbox
            .lock()
            .unwrap()
            .iter()
            .any(|(t, p, _)| t == "cell4/linewarden/status" && p.contains("online"))
    });
    let mut report = String::from("Face\n");
    let mut x = 0.37f64;
    for _ in 0..66 {
        x = (x * 3.7 + 0.11).fract();
        report.push_str(&format!("{:.4}\n", 38.2 + (x - 0.5) * 0.02));
    }
    std::fs::write(d.join("inbox/run-1.csv"), report).unwrap();
    let file = d.join("limits/face.toml");
    wait_until("learned limits", Duration::from_secs(20), || file.exists());

    let results = |inbox: &Inbox| -> Vec<serde_json::Value> {
        inbox
            .lock()
            .unwrap()
            .iter()
            .filter(|(t, _, _)| t == "cell4/linewarden/command/result")
            .map(|(_, p, _)| json(p))
            .collect()
    };
    let send = |payload: String| {
        rt.block_on(hmi.publish(
            "cell4/linewarden/command/approve",
            rumqttc::QoS::AtLeastOnce,
            false,
            payload,
        ))
        .unwrap();
    };
    let expect = |n: usize, what: &str| {
        wait_until(what, Duration::from_secs(10), || results(&inbox).len() >= n);
        results(&inbox)[n - 1].clone()
    };
    send(r#"{"characteristic": "fcae", "by": "R. Okafor"}"#.into());
    let r = expect(1, "the answer to a misspelt characteristic");
    assert_eq!(r["ok"], false);
    assert!(r["error"].as_str().unwrap().contains("\"fcae\""), "{r}");
    send("approve face please".into());
    let r = expect(2, "the answer to a malformed command");
    assert!(
        r["error"].as_str().unwrap().contains("not an approval"),
        "{r}"
    );
    send(format!(
        r#"{{"characteristic": "face", "by": "{}"}}"#,
        "x".repeat(40_000)
    ));
    let r = expect(3, "the answer to an oversized command");
    assert!(r["error"].as_str().unwrap().contains("at most"), "{r}");
    assert!(
        std::fs::read_to_string(&file)
            .unwrap()
            .contains("provisional = true"),
        "nothing was approved by the bad commands"
    );
    send(r#"{"characteristic": "face", "by": "R. Okafor", "note": "setup sheet 14"}"#.into());
    let r = expect(4, "the approval's answer");
    assert_eq!(
        (r["ok"].as_bool(), r["characteristic"].as_str()),
        (Some(true), Some("face")),
        "{r}"
    );
    wait_until("the approved file", Duration::from_secs(10), || {
        std::fs::read_to_string(&file).is_ok_and(|t| t.contains("[approved]"))
    });
    let written = linewarden::limits_file::StoredLimits::load(&file).unwrap();
    assert_eq!(written.approved.as_ref().unwrap().by, "R. Okafor");
    // The same approval again is refused with who approved first.
    send(r#"{"characteristic": "face", "by": "Someone"}"#.into());
    let r = expect(5, "the second approval's answer");
    assert!(
        r["error"]
            .as_str()
            .unwrap()
            .contains("already approved by R. Okafor"),
        "{r}"
    );
    daemon.stop();
}

/// The email output with a mail server up from the start, `digest_s` and `max_per_hour` as
/// given, and the bore's beyond-limits rule at `severity`.
fn email_cell(
    d: &Path,
    port: u16,
    digest_s: u32,
    severity: &str,
    feed_file: Option<&str>,
) -> PathBuf {
    let out = format!(
        "[[output]]\nid = \"quality\"\nkind = \"email\"\nsmtp = \"smtp+plain://localhost:{port}\"\nfrom = \"linewarden@cell4.example\"\nto = [\"quality@cell4.example\"]\ndigest_s = {digest_s}\nmax_per_hour = 1\n"
    );
    let p = cell(d, feed_file, &out);
    let text = std::fs::read_to_string(&p).unwrap().replace(
        "preset = \"western-electric\"",
        &format!(
            "[[characteristic.rules.rule]]\nkind = \"beyond-limits\"\nseverity = \"{severity}\""
        ),
    );
    std::fs::write(&p, text).unwrap();
    p
}

/// When the alert was raised, by the archive (ms since 1970).
fn raised_ms(archive: &Path, id: &str) -> i64 {
    Reader::open(archive)
        .unwrap()
        .iter(&Filter::default())
        .flatten()
        .find_map(|e| match e.record {
            Record::Alert {
                alert_id,
                event: AlertEvent::Raised { .. },
                ..
            } if alert_id == id => Some(e.time_ms),
            _ => None,
        })
        .expect("the alert was raised")
}

/// What broke: with the shipped `digest_s = 30` a stop-level alert waited the whole digest
/// before it left. A stop goes out within 2 s of the subgroup that raised it, whatever
/// `digest_s` and `max_per_hour` say.
#[test]
fn a_stop_alert_is_emailed_within_two_seconds_whatever_the_digest() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let port = free_port();
    let Some(mut smtp) = smtp_server(d, port, None) else {
        return;
    };
    feed(&d.join("feed.jsonl"), &MEANS, 0, 20);
    let cfg = email_cell(d, port, 30, "stop", Some("feed.jsonl"));
    let daemon = Daemon::start(&cfg, &d.join("daemon.log"));
    wait_until("the email", Duration::from_secs(20), || {
        !mailbox(&d.join("maildir")).is_empty()
    });
    let arrived = ["new", "cur"]
        .iter()
        .flat_map(|s| {
            std::fs::read_dir(d.join("maildir").join(s))
                .into_iter()
                .flatten()
                .flatten()
        })
        .map(|e| e.metadata().unwrap().modified().unwrap())
        .min()
        .unwrap()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_millis() as i64;
    daemon.stop();
    let _ = smtp.kill();
    let raised = raised_ms(&d.join("archive"), ALERT);
    assert!(
        arrived - raised < 2000,
        "the stop alert reached the mail server {} ms after it was raised",
        arrived - raised
    );
}

/// What broke: alerts gathered for a digest when the daemon stopped were never sent, and
/// nothing said so. At shutdown the email output sends what it holds (within a bounded time);
/// what it cannot send is named in the log, alert by alert, and goes out at the next start.
#[test]
fn alerts_held_for_a_digest_are_sent_at_shutdown_or_named_and_sent_at_the_next_start() {
    // The mail server up: the held warning goes out as the daemon stops.
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let port = free_port();
    let Some(mut smtp) = smtp_server(d, port, None) else {
        return;
    };
    feed(&d.join("feed.jsonl"), &MEANS, 0, 20);
    let cfg = email_cell(d, port, 30, "warn", Some("feed.jsonl"));
    let daemon = Daemon::start(&cfg, &d.join("daemon.log"));
    daemon.wait_log("ALERT WARN", 1, Duration::from_secs(20));
    std::thread::sleep(Duration::from_millis(300));
    assert!(
        mailbox(&d.join("maildir")).is_empty(),
        "held for the digest"
    );
    daemon.stop();
    let _ = smtp.kill();
    assert_eq!(mailbox(&d.join("maildir")).len(), 1, "sent at shutdown");
    let log = std::fs::read_to_string(d.join("daemon.log")).unwrap();
    assert!(
        log.contains("at shutdown, emailed bore-4-beyond-limits-up"),
        "{log}"
    );
    assert!(
        alert_events(&d.join("archive"))
            .iter()
            .any(|(id, e)| id == ALERT
                && matches!(e, AlertEvent::Delivered { output, .. } if output == "quality"))
    );

    // The mail server down: the log names what waits; the next start sends it.
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let port = free_port();
    feed(&d.join("feed.jsonl"), &MEANS, 0, 20);
    let cfg = email_cell(d, port, 30, "warn", Some("feed.jsonl"));
    let daemon = Daemon::start(&cfg, &d.join("daemon.log"));
    daemon.wait_log("ALERT WARN", 1, Duration::from_secs(20));
    daemon.stop();
    let log = std::fs::read_to_string(d.join("daemon.log")).unwrap();
    assert!(
        log.contains(&format!(
            "at shutdown, alert {ALERT} (warn) is not yet emailed by output quality: it is sent at the next start"
        )),
        "{log}"
    );
    let Some(mut smtp) = smtp_server(d, port, None) else {
        return;
    };
    let cfg2 = email_cell(d, port, 30, "warn", None);
    let daemon = Daemon::start(&cfg2, &d.join("daemon2.log"));
    daemon.wait_log(
        "alert(s) still open from before the restart",
        1,
        Duration::from_secs(10),
    );
    // The digest is 30 s; stopping sends it at once.
    std::thread::sleep(Duration::from_millis(300));
    daemon.stop();
    let _ = smtp.kill();
    assert_eq!(mailbox(&d.join("maildir")).len(), 1);
}
