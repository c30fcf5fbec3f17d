//! The daemon config: every example in config/ is valid, and a bad file is rejected whole with
//! every problem located.

use std::path::Path;

use linewarden::config;

mod common;

#[test]
fn every_example_config_is_valid() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("config");
    let mut n = 0;
    for entry in std::fs::read_dir(&dir).unwrap() {
        let p = entry.unwrap().path();
        if p.file_name().and_then(|e| e.to_str()) == Some("cell.toml") {
            // The installed starting config names the state directory: check it with that
            // moved into a temporary one (tests/install.rs checks it installed, as root).
            let tmp = tempfile::tempdir().unwrap();
            std::fs::create_dir_all(tmp.path().join("inbox")).unwrap();
            let text = std::fs::read_to_string(&p).unwrap().replace(
                "\"/var/lib/linewarden",
                &format!("\"{}", tmp.path().display()),
            );
            assert!(text.contains("learned_limits_dir"));
            std::fs::write(tmp.path().join("cell.toml"), text).unwrap();
            config::load(&tmp.path().join("cell.toml"))
                .unwrap_or_else(|e| panic!("{}:\n{e}", p.display()));
            n += 1;
        } else if p.extension().and_then(|e| e.to_str()) == Some("toml") {
            config::load(&p).unwrap_or_else(|e| panic!("{}:\n{e}", p.display()));
            n += 1;
        }
    }
    assert!(n >= 1, "no example configs found in {}", dir.display());
}

#[test]
fn a_bad_config_reports_every_problem_with_its_place() {
    let dir = tempfile::tempdir().unwrap();
    let text = r#"[daemon]
archive_dir = "archive"
max_segment_mb = 0

[[characteristic]]
id = "bore-a"
subgroup = { size = 1 }
learning = { chart = "xbar-r" }

[[characteristic]]
id = "bore a"
subgroup = { size = 5, window_s = 60 }
valid_min = 5.0
valid_max = 1.0
spec = { lsl = 12.1, usl = 11.9 }

[[characteristic]]
id = "face"
subgroup = { size = 3 }
[characteristic.rules]
preset = "nelson"
[[characteristic.rules.rule]]
kind = "coarse-resolution"
window = 50

[[source]]
id = "feed"
kind = "carrier-pigeon"
"#;
    let path = dir.path().join("cell.toml");
    std::fs::write(&path, text).unwrap();
    let err = config::load(&path).unwrap_err().to_string();
    let f = path.display().to_string();
    let expect = [
        format!("{f}:3:18: daemon.max_segment_mb: 0 is out of range; use 1 to 4096"),
        format!(
            "{f}:7:21: characteristic[0].subgroup.size: characteristic \"bore-a\": subgroup.size = 1 needs chart = \"individuals\""
        ),
        format!("{f}:11:6: characteristic[1].id: \"bore a\" is not a valid identifier"),
        format!(
            "{f}:12:12: characteristic[1].subgroup: characteristic \"bore a\": say how readings form subgroups with exactly one of size, window_s or by_part = true"
        ),
        format!(
            "{f}:14:13: characteristic[1].valid_max: characteristic \"bore a\": valid_max = 1 must be above valid_min = 5"
        ),
        format!(
            "{f}:15:8: characteristic[1].spec: characteristic \"bore a\": the lower specification 12.1 is not below the upper specification 11.9"
        ),
        format!(
            "{f}:22:1: characteristic[2].rules.rule[0]: characteristic \"face\": kind = \"coarse-resolution\" needs a two-sided spec"
        ),
        format!("{f}:28:8: source[0].kind: \"carrier-pigeon\" is not a source kind this build has"),
    ];
    for e in &expect {
        assert!(err.contains(e.as_str()), "missing\n  {e}\nin\n{err}");
    }
    assert_eq!(err.lines().count(), expect.len(), "{err}");
}

#[test]
fn unknown_keys_are_rejected_with_their_position() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("cell.toml");
    std::fs::write(&path, "[daemon]\narchive_dir = \"a\"\nflush_ms = 5\n").unwrap();
    let err = config::load(&path).unwrap_err().to_string();
    assert!(
        err.contains("cell.toml:3:1: daemon.flush_ms: unknown field `flush_ms`"),
        "{err}"
    );
}

#[test]
fn a_bad_mqtt_source_reports_every_problem_and_never_the_password() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("pw"), "s3cret-word\n").unwrap();
    let text = r#"[daemon]
archive_dir = "archive"

[[characteristic]]
id = "bore"
subgroup = { size = 1 }

[[source]]
id = "a"
kind = "mqtt"
broker = "tcp://plant-broker:1883"
topics = ["cell4/#/x"]

[[source]]
id = "b"
kind = "mqtt"
broker = "mqtt://plant-broker:70000"
topics = ["cell4/{characteristic}/measure"]
qos = 2
payload = "plain"
value_pointer = "value"

[[source]]
id = "c"
kind = "mqtt"
broker = "mqtt://plant-broker"
topics = ["cell4/bore"]
username = "lw"
password_file = "pw"
password_env = "LINEWARDEN_TEST_UNSET_VARIABLE"
ca_file = "ca.pem"
duplicates = "content"

[[source]]
id = "d"
kind = "mqtt"
broker = "mqtts://plant-broker"
topics = ["cell4/bore"]
characteristic = "bore"
username = "lw"
password_file = "pw"
"#;
    let p = dir.path().join("bad.toml");
    std::fs::write(&p, text).unwrap();
    let e = config::load(&p).unwrap_err().to_string();
    for want in [
        "bad.toml:11:10: source[0].broker: \"tcp://plant-broker:1883\" is not a broker address",
        "bad.toml:12:11: source[0].topics[0]: \"cell4/#/x\": # must be the last level",
        "bad.toml:17:10: source[1].broker: \"70000\" in \"mqtt://plant-broker:70000\" is not a port number",
        "bad.toml:19:7: source[1].qos: QoS 2",
        "bad.toml:21:17: source[1].value_pointer: \"value\" is not a JSON pointer",
        "source[1].value_pointer: pointers are for payload = \"json\"",
        "source[2].password_env: give password_file or password_env, not both",
        "source[2].ca_file: certificates are for TLS",
        "source[2].duplicates: duplicates = \"content\" needs",
        "source[2]: say which characteristic a message is for",
    ] {
        assert!(e.contains(want), "missing {want:?} in:\n{e}");
    }
    assert!(!e.contains("s3cret"), "the password leaked:\n{e}");
    // The good source parses, and its password stays out of Debug output (and so out of logs).
    let good = text.split("[[source]]").last().unwrap();
    let ok = format!(
        "[daemon]\narchive_dir = \"archive\"\n[[characteristic]]\nid = \"bore\"\nsubgroup = {{ size = 1 }}\n[[source]]{good}"
    );
    std::fs::write(&p, ok).unwrap();
    let cfg = config::load(&p).unwrap();
    let shown = format!("{cfg:?}");
    assert!(shown.contains("plant-broker"), "{shown}");
    assert!(!shown.contains("s3cret"), "the password leaked: {shown}");
    let config::Source::Mqtt(m) = &cfg.sources[0] else {
        panic!("not an MQTT source")
    };
    assert_eq!((m.broker.port, m.broker.tls), (8883, true));
    assert_eq!(m.broker.password.as_ref().unwrap().0, "s3cret-word");
}

#[test]
fn bad_alert_outputs_report_every_problem() {
    let dir = tempfile::tempdir().unwrap();
    let text = r#"[daemon]
archive_dir = "archive"

[control]
socket = "control.sock"
mode = "0666"

[alerts]
stop = { escalate_after = "soon" }
escalate_to = ["pager"]

[[characteristic]]
id = "bore"
subgroup = { size = 1 }

[[output]]
id = "hmi"
kind = "mqtt"
broker = "mqtt://localhost"
topic_prefix = "cell4/#"

[[output]]
id = "mail"
kind = "email"
smtp = "smtp+plain://mail.cell4.example"
from = "not an address"
to = []
password_env = "LINEWARDEN_TEST_UNSET_VARIABLE"

[[output]]
id = "light"
kind = "stack-light"
modbus = "tcp://10.0.0.20:502"
coils = { red = 0, amber = 0 }
lamps = { alarm = ["red", "siren"], party = [] }

[[output]]
id = "pager2"
kind = "sms"
"#;
    let p = dir.path().join("bad.toml");
    std::fs::write(&p, text).unwrap();
    let e = config::load(&p).unwrap_err().to_string();
    for want in [
        "control.mode: \"0666\" lets every user on the machine acknowledge alerts",
        "alerts.stop.escalate_after: \"soon\" is not a duration",
        "alerts.escalate_to[0]: \"pager\" is not a configured output",
        "output[0].topic_prefix: \"cell4/#\" is not a topic prefix",
        "output[1].from: \"not an address\" is not an email address",
        "output[1]: kind = \"email\" needs to = [",
        "output[1].password_env: the environment variable LINEWARDEN_TEST_UNSET_VARIABLE is not set",
        "output[2].coils.red: coil 0 is also amber",
        "output[2].lamps.alarm: \"siren\" is not one of the coils",
        "output[2].lamps.party: \"party\" is not a light state",
        "output[3].kind: \"sms\" is not an output kind",
    ] {
        assert!(e.contains(want), "missing {want:?} in:\n{e}");
    }
    assert!(e.contains("bad.toml:6:8: control.mode"), "positions: {e}");
}

#[test]
fn a_time_zone_and_decimals_are_checked_where_they_are_written() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("cell.toml");
    std::fs::write(
        &path,
        "[daemon]\narchive_dir = \"a\"\ntimezone = \"Europe/Atlantis\"\n\n[[characteristic]]\nid = \"bore\"\nsubgroup = { size = 5 }\ndecimals = 12\n",
    )
    .unwrap();
    let err = config::load(&path).unwrap_err().to_string();
    assert!(
        err.contains("cell.toml:3:12: daemon.timezone: \"Europe/Atlantis\" is not a time zone"),
        "{err}"
    );
    assert!(
        err.contains("characteristic[0].decimals: 12 decimals"),
        "{err}"
    );
    std::fs::write(
        &path,
        "[daemon]\narchive_dir = \"a\"\ntimezone = \"America/Chicago\"\n\n[[characteristic]]\nid = \"bore\"\nsubgroup = { size = 5 }\ndecimals = 3\n",
    )
    .unwrap();
    let cfg = config::load(&path).unwrap();
    assert_eq!(cfg.tz().iana_name(), Some("America/Chicago"));
    assert_eq!(cfg.characteristics[0].decimals, Some(3));
}

/// The regressions: a limits file whose unit (`in`) or specification differs from the config's,
/// or whose UCL is not centre + 3σ/√n (so beyond-limits and the zone rules disagree), was
/// accepted without a word; a typo in a `limits` path quietly switched the characteristic to
/// learning. Each contradiction is now a problem with both values; limits set apart from sigma
/// on purpose are accepted only with `limits_policy = "as-stored"` and a reason; `check` warns
/// about a limits file that does not exist.
#[test]
fn a_limits_file_that_contradicts_the_config_is_refused_with_both_values() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let widened = "format = 1\ncharacteristic = \"bore\"\nchart = \"xbar-r\"\nsubgroup_size = 4\nunit = \"in\"\n[sigma]\nwithin = 0.004\noverall = 0.004\nmethod = \"average range / d2\"\n[location]\ncenter = 12.0\nucl = 12.009\nlcl = 11.994\n[dispersion]\nkind = \"range\"\ncenter = 0.008236\nucl = 0.018792\nlcl = 0.0\n[spec]\nlsl = 11.98\nusl = 12.02\n[provenance]\ncomputed_at = \"2026-12-01T08:00:00Z\"\nsource = \"test\"\ntool = \"linewarden test\"\nsubgroups_total = 25\nsubgroups_used = 25\nused = \"1-25\"\n";
    std::fs::write(d.join("bore.toml"), widened).unwrap();
    let cfg = |extra: &str| {
        format!(
            "[daemon]\narchive_dir = \"a\"\n\n[[characteristic]]\nid = \"bore\"\nunit = \"mm\"\nlimits = \"bore.toml\"\nsubgroup = {{ size = 4 }}\nspec = {{ lsl = 11.985, usl = 12.015 }}\n{extra}"
        )
    };
    let path = d.join("cell.toml");
    std::fs::write(&path, cfg("")).unwrap();
    let err = config::load(&path).unwrap_err().to_string();
    assert!(
        err.contains("unit \"mm\", but the stored limits") && err.contains("are in \"in\""),
        "{err}"
    );
    assert!(
        err.contains("spec lsl 11.985, usl 12.015, target none, but the stored limits")
            && err.contains("spec lsl 11.98, usl 12.02"),
        "{err}"
    );
    assert!(
        err.contains("location.ucl is 12.009, but its sigma gives 12.006"),
        "{err}"
    );
    assert_eq!(
        err.matches("location.ucl is").count(),
        1,
        "each problem once: {err}"
    );
    // Widened on purpose: needs a reason; with one, only the unit and spec remain.
    std::fs::write(&path, cfg("limits_policy = \"as-stored\"\n")).unwrap();
    let err = config::load(&path).unwrap_err().to_string();
    assert!(err.contains("needs limits_reason"), "{err}");
    assert!(!err.contains("location.ucl is"), "{err}");
    let fixed = widened
        .replace("unit = \"in\"", "unit = \"mm\"")
        .replace("lsl = 11.98\nusl = 12.02", "lsl = 11.985\nusl = 12.015");
    std::fs::write(d.join("bore.toml"), fixed).unwrap();
    std::fs::write(
        &path,
        cfg("limits_policy = \"as-stored\"\nlimits_reason = \"upper limit widened for the known tool-wear slope, QE review 2026-11\"\n"),
    )
    .unwrap();
    config::load(&path).unwrap();
    std::fs::write(&path, cfg("limits_policy = \"as-written\"\n")).unwrap();
    let err = config::load(&path).unwrap_err().to_string();
    assert!(
        err.contains("\"as-written\" is not a limits policy"),
        "{err}"
    );

    // A limits path with a typo: valid (the characteristic learns), and `check` says so.
    std::fs::write(&path, cfg("").replace("bore.toml", "bore-limts/bore.toml")).unwrap();
    let o = std::process::Command::new(env!("CARGO_BIN_EXE_linewarden"))
        .args(["check", "--config", path.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(o.status.success());
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("the limits file")
            && e.contains("bore-limts/bore.toml does not exist, so it will learn"),
        "{e}"
    );
}

/// The regression: `check` on a file with six mistakes reported only the first unknown key.
/// Now every unknown key and every value of the wrong type is found (reading goes on past
/// each), along with every problem the validation finds, each once, each at its line:column.
#[test]
fn check_finds_every_mistake_at_once_each_once() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("cell.toml");
    let text = r#"[daemon]
archive_dir = "a"
flush_ms = 5
max_segment_mb = "64"

[[characteristic]]
id = "bore"
subgroup = { sise = 5 }
valid_min = "11"
decimals = 12

[[characteristic]]
id = "face"
nmae = "Face height"
subgroup = { size = 1 }
learning = { subgroups = 1 }

[[source]]
id = "replay"
kind = "replay"
file = "feed.jsonl"
speeed = 2

[alerts]
stop = { acknowledge = "yes" }
"#;
    std::fs::write(&path, text).unwrap();
    let err = config::load(&path).unwrap_err().to_string();
    let expected = [
        "cell.toml:3:1: daemon.flush_ms: unknown field `flush_ms`",
        "cell.toml:4:18: daemon.max_segment_mb: invalid type: string \"64\"",
        "characteristic[0].subgroup.sise: unknown field `sise`",
        "cell.toml:9:13: characteristic[0].valid_min: invalid type: string \"11\"",
        "characteristic[0].decimals: 12 decimals",
        "cell.toml:14:1: characteristic[1].nmae: unknown field `nmae`",
        "characteristic[1].learning.subgroups",
        "source[0].speeed: unknown field `speeed`",
        "alerts.stop.acknowledge: invalid type: string \"yes\"",
    ];
    for e in expected {
        assert!(err.contains(e), "missing {e:?} in:\n{err}");
    }
    for path in [
        "daemon.flush_ms",
        "daemon.max_segment_mb",
        "characteristic[0].subgroup",
        "characteristic[0].valid_min",
        "characteristic[1].nmae",
        "source[0].speeed",
        "alerts.stop.acknowledge",
    ] {
        let lines = err
            .lines()
            .filter(|l| l.contains(&format!(" {path}")))
            .count();
        assert_eq!(lines, 1, "{path} reported {lines} times:\n{err}");
    }
    // And the command line says the same, with a non-zero exit status.
    let o = std::process::Command::new(env!("CARGO_BIN_EXE_linewarden"))
        .args(["check", "--config", path.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(!o.status.success());
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("unknown field `speeed`") && e.contains("12 decimals"),
        "{e}"
    );
}

/// The regression: a relative serial `port` was resolved against the working directory, not
/// the config file, unlike every other path in it.
#[test]
fn a_relative_serial_port_is_the_config_files() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("cell.toml");
    std::fs::write(
        &path,
        "[daemon]\narchive_dir = \"a\"\n\n[[characteristic]]\nid = \"bore\"\nsubgroup = { size = 5 }\n\n[[source]]\nid = \"caliper\"\nkind = \"serial\"\nport = \"dev/caliper\"\ncharacteristic = \"bore\"\n",
    )
    .unwrap();
    let cfg = config::load(&path).unwrap();
    let port = cfg
        .sources
        .iter()
        .find_map(|s| match s {
            config::Source::Serial(g) => Some(g.port.clone()),
            _ => None,
        })
        .unwrap();
    assert_eq!(port, dir.path().join("dev/caliper").display().to_string());
}

/// Learned limits go to `learned_limits_dir` (named after the configured file, or the id), an
/// engineer's existing file wins over them, and two characteristics cannot share a file there.
#[test]
fn learned_limits_dir_places_learned_files_and_an_engineers_file_wins() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let text = r#"
[daemon]
archive_dir = "archive"
learned_limits_dir = "state/limits"

[[characteristic]]
id = "bore"
unit = "mm"
limits = "etc-limits/bore.toml"
subgroup = { size = 4 }

[[characteristic]]
id = "face"
subgroup = { size = 1 }
"#;
    std::fs::write(d.join("cell.toml"), text).unwrap();
    let c = linewarden::config::load(&d.join("cell.toml")).unwrap();
    assert_eq!(
        c.learned_limits_dir.as_deref(),
        Some(d.join("state/limits").as_path())
    );
    assert_eq!(
        c.characteristics[0].limits_path.as_deref(),
        Some(d.join("state/limits/bore.toml").as_path())
    );
    assert_eq!(
        c.characteristics[1].limits_path.as_deref(),
        Some(d.join("state/limits/face.toml").as_path())
    );
    std::fs::create_dir_all(d.join("etc-limits")).unwrap();
    std::fs::write(d.join("etc-limits/bore.toml"), common::BORE_LIMITS).unwrap();
    let c = linewarden::config::load(&d.join("cell.toml")).unwrap();
    assert_eq!(
        c.characteristics[0].limits_path.as_deref(),
        Some(d.join("etc-limits/bore.toml").as_path())
    );
    assert!(c.characteristics[0].limits.is_some());

    let clash = text.replace(
        "id = \"face\"",
        "id = \"face\"\nlimits = \"other/bore.toml\"",
    );
    std::fs::write(d.join("clash.toml"), clash).unwrap();
    std::fs::remove_file(d.join("etc-limits/bore.toml")).unwrap();
    let e = linewarden::config::load(&d.join("clash.toml"))
        .unwrap_err()
        .to_string();
    assert!(e.contains("is also characteristic \"bore\"'s"), "{e}");
}

/// 10,000 characteristics on one preset must not hold 10,000 copies of it: characteristics
/// with the same rules share one rule set, and the evaluators built from it share its
/// subgroup rules; different rules stay apart.
#[test]
fn characteristics_with_the_same_rules_share_one_copy() {
    use linewarden::rules::point::{ChartBasis, PointEvaluator};
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let text = r#"
[daemon]
archive_dir = "archive"

[[characteristic]]
id = "a"
subgroup = { size = 4 }
[characteristic.rules]
preset = "nelson"

[[characteristic]]
id = "b"
subgroup = { size = 4 }
[characteristic.rules]
preset = "nelson"

[[characteristic]]
id = "c"
subgroup = { size = 4 }
[characteristic.rules]
preset = "nelson"
off = ["steady-trend"]
"#;
    std::fs::write(d.join("cell.toml"), text).unwrap();
    let c = linewarden::config::load(&d.join("cell.toml")).unwrap();
    let [a, b, x] = [0, 1, 2].map(|i| c.characteristics[i].rules.clone());
    assert!(std::sync::Arc::ptr_eq(&a, &b), "the same preset: one copy");
    assert!(
        !std::sync::Arc::ptr_eq(&a, &x),
        "different rules: their own"
    );
    assert_ne!(a.rules.len(), x.rules.len());
    let e1 = PointEvaluator::new(&a, ChartBasis::standard());
    let e2 = PointEvaluator::new(&b, ChartBasis::standard());
    assert!(std::ptr::eq(e1.rules().as_ptr(), e2.rules().as_ptr()));
}

#[test]
fn a_web_address_that_is_a_name_or_has_no_port_is_refused_where_it_is_written() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("cell.toml");
    for (listen, ok) in [
        ("localhost:9630", false),
        ("127.0.0.1", false),
        ("127.0.0.1:99999", false),
        ("0.0.0.0:9630", true),
        ("[::1]:9630", true),
    ] {
        std::fs::write(
            &path,
            format!("[daemon]\narchive_dir = \"a\"\n\n[[characteristic]]\nid = \"bore\"\nsubgroup = {{ size = 5 }}\n\n[web]\nlisten = \"{listen}\"\nport = 3\n"),
        )
        .unwrap();
        let err = config::load(&path).unwrap_err().to_string();
        // Every problem at once: the unknown key, and the address unless it is good.
        assert!(err.contains("web.port: unknown field `port`"), "{err}");
        assert_eq!(
            err.contains(&format!(
                "web.listen: \"{listen}\" is not an address and port"
            )),
            !ok,
            "{listen}: {err}"
        );
    }
}

/// Acknowledging from the page, configured wrong in every way at once: each problem once, with
/// where it is (the users file's by line), and nothing listens.
#[test]
fn a_bad_page_login_setup_is_refused_with_every_problem_and_its_line() {
    let dir = tempfile::tempdir().unwrap();
    let hash = linewarden::daemon::access::hash_password("a-long-password").unwrap();
    std::fs::write(
        dir.path().join("users"),
        format!(
            "# people\ndana:{hash}\ndana:{hash}\nno hash here\nomar:$2y$10$notargon\nev e:{hash}\n"
        ),
    )
    .unwrap();
    std::fs::write(dir.path().join("cert.pem"), "not a certificate\n").unwrap();
    let path = dir.path().join("cell.toml");
    std::fs::write(
        &path,
        "[daemon]\narchive_dir = \"a\"\n\n[[characteristic]]\nid = \"bore\"\nsubgroup = { size = 5 }\n\n\
         [web]\nlisten = \"0.0.0.0:9630\"\nusers = \"users\"\nhosts = [\"http://cell4\", \"cell4\", \"CELL4\"]\n\
         tls_certificate = \"cert.pem\"\nsession_hours = 0\n",
    )
    .unwrap();
    let err = config::load(&path).unwrap_err().to_string();
    for want in [
        "users line 3: user \"dana\" is listed twice",
        "users line 4: expected NAME:HASH",
        "users line 5: user \"omar\": the hash is not an argon2 hash string",
        "users line 6: the user name \"ev e\" may hold letters",
        "web.hosts[0]: \"http://cell4\" is not a host name",
        "web.hosts[2]: \"CELL4\" is listed twice",
        "web.tls_key: tls_certificate is set without tls_key",
        "web.session_hours: 0 is not a login's length",
    ] {
        assert_eq!(err.matches(want).count(), 1, "{want:?} once in\n{err}");
    }
    // With the names given, no complaint about them; an empty users file is one problem.
    std::fs::write(dir.path().join("users"), "# nobody yet\n").unwrap();
    std::fs::write(
        &path,
        "[daemon]\narchive_dir = \"a\"\n\n[[characteristic]]\nid = \"bore\"\nsubgroup = { size = 5 }\n\n\
         [web]\nlisten = \"0.0.0.0:9630\"\nusers = \"users\"\n",
    )
    .unwrap();
    let err = config::load(&path).unwrap_err().to_string();
    assert!(err.contains("names no user"), "{err}");
    assert!(
        err.contains("web.hosts: acknowledging from the page on 0.0.0.0:9630"),
        "{err}"
    );
}
