//! The adapter pool against a test adapter that misbehaves on purpose (tests/adapters/faulty.py): every
//! fault gives a clear error or is survived, within its timeout, and no process is left behind.

use std::path::PathBuf;
use std::time::{Duration, Instant};

use varpost::adapter::{AdapterConfig, AdapterProblem, EncodingChoice};
use varpost::{EvalError, Problem};

fn python() -> String {
    std::env::var("VARPOST_PYTHON").unwrap_or_else(|_| "python3".into())
}

fn script() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/adapters/faulty.py")
}

fn config(mode: &str) -> AdapterConfig {
    let mut c = AdapterConfig::new(format!("{} '{}' {mode}", python(), script().display()));
    c.eval_timeout = Some(Duration::from_secs(5));
    c.handshake_timeout = Duration::from_secs(10);
    c.max_restarts = 1;
    c
}

/// J(x) = 1/2 Σ (x_i − c_i)² / s_i², c_i = i + 1, s_i = 1 + i/2: the quadratic in faulty.py, closed form.
fn quadratic(x: &[f64]) -> (f64, Vec<f64>) {
    let mut j = 0.0;
    let mut g = Vec::new();
    for (i, xi) in x.iter().enumerate() {
        let (c, s) = (i as f64 + 1.0, 1.0 + i as f64 / 2.0);
        j += 0.5 * (xi - c).powi(2) / (s * s);
        g.push((xi - c) / (s * s));
    }
    (j, g)
}

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs().max(1e-300)
}

fn start(c: &AdapterConfig) -> AdapterProblem {
    match AdapterProblem::start(c) {
        Ok(p) => p,
        Err(e) => panic!("adapter did not start: {e}"),
    }
}

fn failed_message(e: EvalError) -> String {
    match e {
        EvalError::Failed {
            message,
            recoverable: false,
        } => message,
        other => panic!("expected a fatal failure, got {other:?}"),
    }
}

#[test]
fn a_well_behaved_adapter_gives_the_closed_form_in_both_encodings() {
    for enc in [EncodingChoice::Text, EncodingChoice::Binary] {
        let mut c = config("ok");
        c.encoding = enc;
        let p = start(&c);
        assert_eq!(p.dim(), 4);
        assert_eq!(p.label(), Some("faulty test adapter (ok)"));
        let x = [0.3, -1.7, 2.9, 1e-3];
        let mut g = vec![0.0; 4];
        let j = p.cost_grad(&x, &mut g).unwrap();
        let (j0, g0) = quadratic(&x);
        // Exact: the adapter computes the same double-precision expression.
        assert!(rel(j, j0) < 1e-12, "{j} vs {j0}");
        for (a, b) in g.iter().zip(&g0) {
            assert!(rel(*a, *b) < 1e-12);
        }
        assert!(rel(p.cost(&x).unwrap(), j0) < 1e-12);
        assert!(!p.has_hess_vec());
        assert!(matches!(
            p.hess_vec(&x, &x, &mut g),
            Err(EvalError::Unsupported { .. })
        ));
        assert_eq!(p.cost_split(&x).unwrap(), None);
        assert!(p.prior().is_none());
    }
}

#[test]
fn a_crash_mid_run_is_survived_with_the_right_result() {
    let state = std::env::temp_dir().join(format!("varpost-crash-once-{}", std::process::id()));
    let _ = std::fs::remove_file(&state);
    let log_dir = std::env::temp_dir().join(format!("varpost-crash-logs-{}", std::process::id()));
    let mut c = config(&format!("crash_once '{}'", state.display()));
    c.log_dir = Some(log_dir.clone());
    let p = start(&c);
    let mut g = vec![0.0; 4];
    for k in 0..4 {
        let x = [k as f64, 1.0, -2.0, 0.5];
        let j = p.cost_grad(&x, &mut g).unwrap();
        assert!(rel(j, quadratic(&x).0) < 1e-12);
    }
    assert_eq!(p.restarts(), 1);
    drop(p);
    let log = std::fs::read_to_string(log_dir.join("adapter-0.log")).unwrap();
    assert!(
        log.contains("simulated crash in the model") && log.contains("restarted"),
        "{log}"
    );
    let _ = std::fs::remove_file(&state);
    let _ = std::fs::remove_dir_all(&log_dir);
}

#[test]
fn an_adapter_that_always_crashes_gives_a_clear_error() {
    let p = start(&config("crash_always"));
    let t = Instant::now();
    let m = failed_message(p.cost_grad(&[0.0; 4], &mut [0.0; 4]).unwrap_err());
    assert!(t.elapsed() < Duration::from_secs(10));
    assert!(
        m.contains("faulty.py") && m.contains("crash_always"),
        "names the command: {m}"
    );
    assert!(m.contains("exited with status 3"), "names the status: {m}");
    assert!(
        m.contains("the model ran out of memory"),
        "quotes stderr: {m}"
    );
    assert!(m.contains("after 1 restart"), "{m}");
}

#[test]
fn a_signal_is_named() {
    let p = start(&config("segfault"));
    let m = failed_message(p.cost_grad(&[0.0; 4], &mut [0.0; 4]).unwrap_err());
    assert!(
        m.contains("signal 11 (SIGSEGV)") && m.contains("about to fault"),
        "{m}"
    );
}

#[test]
fn a_hung_adapter_is_killed_after_the_timeout() {
    let mut c = config("hang");
    c.eval_timeout = Some(Duration::from_millis(400));
    let p = start(&c);
    let t = Instant::now();
    let m = failed_message(p.cost(&[0.0; 4]).unwrap_err());
    // Two attempts (one restart) of 0.4 s each, plus start-up and the kill grace.
    assert!(t.elapsed() < Duration::from_secs(8), "{:?}", t.elapsed());
    assert!(
        m.contains("within 0.4 s") && m.contains("killed") && m.contains("waiting forever"),
        "{m}"
    );
}

#[test]
fn garbage_on_stdout_is_quoted() {
    let p = start(&config("garbage"));
    let m = failed_message(p.cost_grad(&[0.0; 4], &mut [0.0; 4]).unwrap_err());
    assert!(
        m.contains("Iteration 1: residual 0.5") && m.contains("broke the protocol"),
        "{m}"
    );
    let mut c = config("garbage");
    c.encoding = EncodingChoice::Binary;
    let p = start(&c);
    let m = failed_message(p.cost_grad(&[0.0; 4], &mut [0.0; 4]).unwrap_err());
    assert!(
        m.contains("Iteration 1") && m.contains("printing text to stdout"),
        "{m}"
    );
}

#[test]
fn a_wrong_reply_id_is_an_error() {
    let p = start(&config("wrong_id"));
    let m = failed_message(p.cost_grad(&[0.0; 4], &mut [0.0; 4]).unwrap_err());
    assert!(m.contains("id 999") && m.contains("request id 1"), "{m}");
}

#[test]
fn a_wrong_gradient_length_is_a_dimension_error() {
    for enc in [EncodingChoice::Text, EncodingChoice::Binary] {
        let mut c = config("wrong_length");
        c.encoding = enc;
        let p = start(&c);
        match p.cost_grad(&[0.0; 4], &mut [0.0; 4]) {
            Err(EvalError::Dimension {
                what,
                expected: 4,
                got: 3,
            }) => assert!(what.contains("gradient"), "{what}"),
            other => panic!("expected a dimension error, got {other:?}"),
        }
    }
}

#[test]
fn handshake_failures_are_clear() {
    let e = AdapterProblem::start(&config("wrong_version"))
        .err()
        .unwrap()
        .to_string();
    assert!(
        e.contains("protocol version 99") && e.contains("version 1"),
        "{e}"
    );
    let e = AdapterProblem::start(&config("stray_stdout"))
        .err()
        .unwrap()
        .to_string();
    assert!(
        e.contains("Loading model fields...") && e.contains("hello"),
        "{e}"
    );
    let mut c = config("slow_start");
    c.handshake_timeout = Duration::from_millis(300);
    let t = Instant::now();
    let e = AdapterProblem::start(&c).err().unwrap().to_string();
    assert!(t.elapsed() < Duration::from_secs(5));
    assert!(e.contains("no hello line within 0.3 s"), "{e}");
    let e = AdapterProblem::start(&AdapterConfig::new("/nonexistent/model-adapter --fast"))
        .err()
        .unwrap()
        .to_string();
    assert!(
        e.contains("cannot start") && e.contains("/nonexistent/model-adapter"),
        "{e}"
    );
    let e = AdapterProblem::start(&AdapterConfig::new("python3 'unterminated"))
        .err()
        .unwrap()
        .to_string();
    assert!(e.contains("unterminated single quote"), "{e}");
    let e = AdapterProblem::start(&config("ok").clone_with_workers(0))
        .err()
        .unwrap()
        .to_string();
    assert!(e.contains("at least 1"), "{e}");
}

trait WithWorkers {
    fn clone_with_workers(&self, k: usize) -> Self;
}
impl WithWorkers for AdapterConfig {
    fn clone_with_workers(&self, k: usize) -> Self {
        let mut c = self.clone();
        c.workers = k;
        c
    }
}

#[test]
fn adapter_errors_and_nonfinite_values_map_to_evaluation_errors() {
    let p = start(&config("errors"));
    let mut g = vec![0.0; 4];
    match p.cost_grad(&[-200.0, 0.0, 0.0, 0.0], &mut g) {
        Err(EvalError::Failed {
            message,
            recoverable: true,
        }) => assert!(message.contains("blew up at step 12")),
        other => panic!("{other:?}"),
    }
    match p.cost_grad(&[200.0, 0.0, 0.0, 0.0], &mut g) {
        Err(EvalError::NonFinite { what }) => assert_eq!(what, "cost"),
        other => panic!("{other:?}"),
    }
    match p.cost_grad(&[2000.0, 0.0, 0.0, 0.0], &mut g) {
        Err(EvalError::Failed {
            message,
            recoverable: false,
        }) => {
            assert!(
                message.contains("RuntimeError: the observation file is missing"),
                "{message}"
            )
        }
        other => panic!("{other:?}"),
    }
    // The worker survives all three and still answers.
    let x = [1.0, 2.0, 3.0, 4.0];
    assert_eq!(p.cost_grad(&x, &mut g).unwrap(), 0.0);
    assert_eq!(p.restarts(), 0);
}

#[test]
fn concurrent_callers_use_the_workers_in_parallel() {
    let mut c = config("ok");
    c.workers = 3;
    let p = start(&c);
    assert_eq!(p.workers(), 3);
    std::thread::scope(|s| {
        for t in 0..6 {
            let p = &p;
            s.spawn(move || {
                for k in 0..20 {
                    let x = [t as f64, k as f64, -1.0, 0.25];
                    let mut g = vec![0.0; 4];
                    let j = p.cost_grad(&x, &mut g).unwrap();
                    assert!(rel(j, quadratic(&x).0) < 1e-12);
                }
            });
        }
    });
}

/// The helper-free Python adapter printed in adapters/PROTOCOL.md works as documented:
/// J(x) = ½ Σ (x_i − 1)², so J(0) = 3/2 and ∇J(0) = (−1, −1, −1).
#[test]
fn the_minimal_adapter_in_the_protocol_document_works() {
    let doc = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/adapters/PROTOCOL.md"))
        .unwrap();
    let begin = doc.rfind("```python\n").expect("a python block") + "```python\n".len();
    let code = &doc[begin..begin + doc[begin..].find("```").unwrap()];
    let path = std::env::temp_dir().join(format!("varpost-minimal-{}.py", std::process::id()));
    std::fs::write(&path, code).unwrap();
    let p = start(&AdapterConfig::new(format!(
        "{} '{}'",
        python(),
        path.display()
    )));
    let mut g = vec![0.0; 3];
    assert_eq!(p.cost_grad(&[0.0; 3], &mut g).unwrap(), 1.5);
    assert_eq!(g, vec![-1.0; 3]);
    assert_eq!(p.cost(&[1.0, 1.0, 3.0]).unwrap(), 2.0);
    drop(p);
    let _ = std::fs::remove_file(&path);
}

#[test]
fn an_adapter_that_stops_reading_cannot_block_a_large_request() {
    let mut c = config("deaf");
    c.eval_timeout = Some(Duration::from_millis(500));
    c.max_restarts = 0;
    let p = start(&c);
    let x = vec![0.5; 3_000_000];
    let t = Instant::now();
    let m = failed_message(p.cost(&x).unwrap_err());
    // The 24 MB request fills the pipe; the write waits only until the request's deadline.
    assert!(t.elapsed() < Duration::from_secs(5), "{:?}", t.elapsed());
    assert!(
        m.contains("within 0.5 s") && m.contains("not reading any more"),
        "{m}"
    );
}

#[test]
fn a_hello_declaring_a_huge_dimension_is_refused_with_the_memory_it_would_need() {
    // 2^62 components and 1e12 (written with an exponent): refused at the handshake, before any vector of
    // that length exists, with the amount of memory named.
    for (dim, unit) in [("4611686018427387904", "PiB"), ("1e12", "TiB")] {
        let e = AdapterProblem::start(&config(&format!("huge_dim {dim}")))
            .err()
            .expect("refused")
            .to_string();
        assert!(
            e.contains("would need")
                && e.contains(unit)
                && e.contains("dim")
                && e.contains("huge_dim"),
            "{e}"
        );
    }
    let e = AdapterProblem::start(&config("huge_dim 1e30"))
        .err()
        .expect("refused")
        .to_string();
    assert!(e.contains("more than any machine has"), "{e}");
}

#[test]
fn an_adapter_closing_its_stdout_is_reported_as_such_not_as_killed_by_varpost() {
    let mut c = config("close_stdout");
    c.max_restarts = 0;
    let p = start(&c);
    let m = failed_message(p.cost_grad(&[0.0; 4], &mut [0.0; 4]).unwrap_err());
    assert!(
        m.contains("closed its output (stdout) during a cost_grad request")
            && m.contains("still running")
            && m.contains("closing stdout"),
        "{m}"
    );
    assert!(!m.contains("SIGTERM") && !m.contains("signal"), "{m}");
    let mut c = config("close_stdout_exit");
    c.max_restarts = 0;
    let p = start(&c);
    let m = failed_message(p.cost_grad(&[0.0; 4], &mut [0.0; 4]).unwrap_err());
    assert!(
        m.contains(
            "closed its output (stdout) during a cost_grad request and exited with status 4"
        ),
        "{m}"
    );
}

/// Splits a log into (head, dropped byte count, tail) at varpost's note.
fn log_parts(log: &[u8]) -> (&[u8], u64, &[u8]) {
    let mark = b"\n[varpost] ";
    let at = log
        .windows(mark.len())
        .position(|w| w == mark)
        .expect("the log has a note on dropped bytes");
    let rest = &log[at + mark.len()..];
    let end = rest.iter().position(|&b| b == b'\n').unwrap();
    let note = String::from_utf8_lossy(&rest[..end]);
    let dropped = note.split(' ').next().unwrap().parse().unwrap();
    (&log[..at], dropped, &rest[end + 1..])
}

#[test]
fn a_chatty_adapter_cannot_make_its_log_grow_without_bound() {
    use varpost::adapter::process::{LOG_HEAD, LOG_TAIL};
    let log_dir = std::env::temp_dir().join(format!("varpost-chatty-logs-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&log_dir);
    let mut c = config("chatty 24");
    c.log_dir = Some(log_dir.clone());
    let p = start(&c);
    let mut g = vec![0.0; 4];
    let x = [0.5, 1.0, -2.0, 3.0];
    assert!(rel(p.cost_grad(&x, &mut g).unwrap(), quadratic(&x).0) < 1e-12);
    drop(p);
    // What the adapter wrote: 24 MiB of numbered 100-byte lines (tests/adapters/faulty.py, mode chatty).
    let lines = 24 * 1024 * 1024 / 100;
    let mut all = Vec::with_capacity(lines * 100);
    for k in 0..lines {
        all.extend_from_slice(format!("chatty line {k:08} {}\n", ".".repeat(78)).as_bytes());
    }
    let log = std::fs::read(log_dir.join("adapter-0.log")).unwrap();
    assert!(
        log.len() as u64 <= LOG_HEAD + 2 * LOG_TAIL + 512,
        "log of {} bytes",
        log.len()
    );
    let (head, dropped, tail) = log_parts(&log);
    assert_eq!(head, &all[..LOG_HEAD as usize], "the head is the start");
    assert!(all.ends_with(tail), "the tail is the end");
    assert!(tail.len() as u64 >= LOG_TAIL);
    assert_eq!(
        head.len() + dropped as usize + tail.len(),
        all.len(),
        "the note counts the dropped bytes"
    );
    let _ = std::fs::remove_dir_all(&log_dir);
}
