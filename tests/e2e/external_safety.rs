//! External simulators as an unkind user would drive them: hostile text in
//! fixed inputs, values with 17 significant digits, a simulator that leaves
//! a detached child holding its output, a worker killed while runs are
//! under way.

use crate::harness::*;
use std::path::Path;
use std::time::{Duration, Instant};

/// Shell and JSON metacharacters, a command substitution, quotes, a newline.
const HOSTILE: &str = "fast; touch PWNED1 && $(touch PWNED2) `touch PWNED3` '\"\\ |&<>\n{mode}";

/// The hostile value as a TOML basic string.
fn toml_string(s: &str) -> String {
    let mut out = String::from("\"");
    for c in s.chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

fn no_pwned(dir: &Path) {
    for entry in walk(dir) {
        assert!(
            !entry.to_string_lossy().contains("PWNED"),
            "a value ran as a command: {} exists",
            entry.display()
        );
    }
}

fn walk(dir: &Path) -> Vec<std::path::PathBuf> {
    let mut out = Vec::new();
    if let Ok(rd) = std::fs::read_dir(dir) {
        for e in rd.flatten() {
            let p = e.path();
            if p.is_dir() {
                out.extend(walk(&p));
            }
            out.push(p);
        }
    }
    out
}

fn sweep_with(dir: &Path, command: &str) -> std::path::PathBuf {
    let spec = dir.join("hostile.toml");
    std::fs::write(
        &spec,
        format!(
            "name = \"hostile\"\nbudget = 2\ninitial = 2\nretries = 0\n\
             [model]\nname = \"recorder\"\ncommand = {command}\n\
             [model.fixed]\nmode = {}\nsteps = 6.0\n\
             [params.x]\nrange = [0.0, 1.0]\n[objective]\nminimize = \"value\"\n",
            toml_string(HOSTILE)
        ),
    )
    .expect("write");
    spec
}

/// A hostile text value reaches the simulator as data, through placeholders,
/// environment variables and stdin; a `sh -c` script with a placeholder is
/// refused before anything runs.
#[test]
fn hostile_text_values_reach_the_simulator_as_data() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    // The recorder writes what it received, byte for byte, next to the sweep.
    std::fs::write(
        dir.join("record.py"),
        r#"import json, os, sys
out = sys.argv[1]
stdin = json.load(sys.stdin)
with open(out + ".argv", "w") as f: f.write(sys.argv[2])
with open(out + ".env", "w") as f: f.write(os.environ["TESSERA_PARAM_MODE"])
with open(out + ".stdin", "w") as f: f.write(stdin["inputs"]["mode"])
with open(out + ".steps", "w") as f: f.write(json.dumps(stdin["inputs"]["steps"]) + " " + os.environ["TESSERA_PARAM_STEPS"])
print(json.dumps({"value": 1.0}))
"#,
    )
    .expect("write");
    let rec = dir.join("rec").display().to_string();
    let spec = sweep_with(
        dir,
        &format!("[\"python3\", \"record.py\", \"{rec}-{{x}}\", \"{{mode}}\"]"),
    );
    let out = tessera()
        .arg("run")
        .arg(&spec)
        .args(["--workers", "1"])
        .current_dir(dir)
        .output()
        .expect("run");
    ok(&out, "run with the recorder");
    let mut seen = 0;
    for p in walk(dir) {
        let name = p.display().to_string();
        if name.ends_with(".argv") || name.ends_with(".env") || name.ends_with(".stdin") {
            let got = std::fs::read_to_string(&p).expect("read");
            assert_eq!(got, HOSTILE, "{name} differs");
            seen += 1;
        }
        if name.ends_with(".steps") {
            // Whole numbers are integers on stdin and in the environment alike.
            assert_eq!(std::fs::read_to_string(&p).expect("read"), "6 6");
        }
    }
    assert_eq!(seen, 6, "2 runs x 3 channels");
    no_pwned(dir);

    // The environment read by a shell script, quoted: data.
    let spec = sweep_with(
        dir,
        "[\"sh\", \"-c\", \"printf '%s' \\\"$TESSERA_PARAM_MODE\\\" > \\\"$TESSERA_LAUNCH_DIR/sh-$TESSERA_EVALUATION_ID.env\\\"; echo '{\\\"value\\\": 1}'\"]",
    );
    let out = tessera()
        .arg("run")
        .arg(&spec)
        .arg("--db")
        .arg(dir.join("env.db"))
        .current_dir(dir)
        .output()
        .expect("run");
    ok(&out, "run with a sh -c script reading the environment");
    let envs: Vec<_> = walk(dir)
        .into_iter()
        .filter(|p| {
            p.file_name()
                .is_some_and(|n| n.to_string_lossy().starts_with("sh-"))
        })
        .collect();
    assert_eq!(envs.len(), 2);
    for p in envs {
        assert_eq!(std::fs::read_to_string(&p).expect("read"), HOSTILE);
    }
    no_pwned(dir);

    // A placeholder inside a sh -c script is refused before anything runs.
    let spec = sweep_with(
        dir,
        "[\"sh\", \"-c\", \"echo {mode} > got; echo '{\\\"value\\\": 1}'\"]",
    );
    let out = tessera()
        .arg("run")
        .arg(&spec)
        .arg("--db")
        .arg(dir.join("refused.db"))
        .current_dir(dir)
        .output()
        .expect("run");
    assert_eq!(out.status.code(), Some(1), "{}", text(&out.stderr));
    let err = text(&out.stderr);
    assert!(err.contains("$TESSERA_PARAM_MODE"), "{err}");
    assert!(!dir.join("got").exists());
    no_pwned(dir);
    // The same for a worker's own --command.
    let out = tessera()
        .args(["worker", "--coordinator", "http://127.0.0.1:9", "--command"])
        .arg("recorder=sh -c 'echo {mode}'")
        .output()
        .expect("worker");
    assert!(!out.status.success());
    assert!(
        text(&out.stderr).contains("$TESSERA_PARAM_MODE"),
        "{}",
        text(&out.stderr)
    );
}

/// Values a simulator prints come back out of `export` bit for bit, the
/// hard cases included (17 significant digits, subnormals, the largest
/// doubles, negative zero). Reference: Rust's `str::parse::<f64>`, which
/// rounds correctly (IEEE 754 round-to-nearest).
#[test]
fn values_printed_by_a_simulator_come_back_bit_for_bit() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let printed = [
        "25854.295647428462",
        "0.30000000000000004",
        "5e-324",
        "2.2250738585072014e-308",
        "2.225073858507201e-308",
        "1e308",
        "1.7976931348623157e308",
        "-0.0",
        "123456789.12345678",
        "9007199254740993",
        "0.1000000000000000055511151231257827",
    ];
    let line = printed
        .iter()
        .enumerate()
        .map(|(i, v)| format!("\"m{i}\": {v}"))
        .collect::<Vec<_>>()
        .join(", ");
    std::fs::write(dir.join("line.json"), format!("{{{line}}}\n")).expect("write");
    let spec = dir.join("exact.toml");
    std::fs::write(
        &spec,
        "name = \"exact\"\nbudget = 3\ninitial = 3\n[model]\nname = \"printer\"\n\
         command = [\"cat\", \"line.json\"]\n[params.x]\nrange = [0.0, 1.0]\n\
         [objective]\nminimize = \"m0\"\n",
    )
    .expect("write");
    ok(
        &tessera()
            .arg("run")
            .arg(&spec)
            .current_dir(dir)
            .output()
            .expect("run"),
        "run",
    );
    let want: Vec<u64> = printed
        .iter()
        .map(|v| v.parse::<f64>().expect("a number").to_bits())
        .collect();
    let rows = export_rows(&dir.join("exact.db"));
    assert_eq!(rows.len(), 3);
    for r in &rows {
        for (i, w) in want.iter().enumerate() {
            let cell = &r[&format!("m{i}")];
            let got = cell.parse::<f64>().expect("exported number").to_bits();
            assert_eq!(got, *w, "m{i}: printed {}, exported {cell}", printed[i]);
        }
    }
    let out = tessera()
        .args(["export", "--format", "jsonl", "--db"])
        .arg(dir.join("exact.db"))
        .output()
        .expect("export");
    ok(&out, "export jsonl");
    for l in text(&out.stdout).lines() {
        // Parse the exported text as JSON numbers with a correctly rounding reader.
        for (i, w) in want.iter().enumerate() {
            let key = format!("\"m{i}\":");
            let at = l.find(&key).expect("metric in the line") + key.len();
            let rest = &l[at..];
            let end = rest.find([',', '}']).expect("end of number");
            let got = rest[..end].trim().parse::<f64>().expect("number").to_bits();
            assert_eq!(got, *w, "m{i} in JSON lines: {}", &rest[..end]);
        }
    }
}

/// A simulator that prints its metrics and leaves a detached child holding
/// its output: the run finishes when the simulator exits, with its metrics,
/// and the detached child does not survive it.
#[test]
fn a_detached_child_holding_stdout_does_not_lose_the_metrics() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let marker = format!("{}", 300 + std::process::id() % 100);
    let script = dir.join("s.sh");
    std::fs::write(
        &script,
        // The pause lets the child leave the group before the script ends.
        format!("#!/bin/sh\nsetsid sleep {marker}.5 &\nsleep 0.3\necho '{{\"value\":1}}'\n"),
    )
    .expect("write");
    std::fs::set_permissions(&script, std::os::unix::fs::PermissionsExt::from_mode(0o755))
        .expect("chmod");
    let started = Instant::now();
    let out = tessera()
        .args(["simulate", "m", "--json", "--command"])
        .arg(format!("m={}", script.display()))
        .output()
        .expect("simulate");
    ok(&out, "simulate");
    assert!(
        started.elapsed() < Duration::from_secs(5),
        "took {:?}",
        started.elapsed()
    );
    assert!(
        text(&out.stdout).contains("\"value\":1"),
        "{}",
        text(&out.stdout)
    );
    std::thread::sleep(Duration::from_millis(300));
    assert!(
        !processes_with(&format!("sleep {marker}.5")),
        "the detached child is still running"
    );
}

/// Whether a process whose command line is exactly `cmdline` exists.
fn processes_with(cmdline: &str) -> bool {
    walk_proc().iter().any(|c| c == cmdline)
}

fn walk_proc() -> Vec<String> {
    let mut out = Vec::new();
    if let Ok(rd) = std::fs::read_dir("/proc") {
        for e in rd.flatten() {
            if let Ok(raw) = std::fs::read(e.path().join("cmdline")) {
                let words: Vec<String> = raw
                    .split(|b| *b == 0)
                    .filter(|w| !w.is_empty())
                    .map(|w| String::from_utf8_lossy(w).into_owned())
                    .collect();
                out.push(words.join(" "));
            }
        }
    }
    out
}

/// A worker killed with SIGKILL leaves none of its runs behind.
#[test]
fn a_killed_worker_leaves_no_run_behind() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = dir.join("slow.toml");
    std::fs::write(
        &spec,
        "name = \"slow\"\nbudget = 2\ninitial = 2\n[model]\nname = \"slow\"\n\
         [params.x]\nrange = [0.0, 1.0]\n[objective]\nminimize = \"value\"\n",
    )
    .expect("write");
    let port = free_port();
    let mut serve = tessera();
    serve
        .arg("serve")
        .arg(&spec)
        .arg("--db")
        .arg(dir.join("slow.db"))
        .args(["--listen", &format!("127.0.0.1:{port}")]);
    let _coord = Proc::start(serve, dir, "coordinator");
    let pids = dir.join("pids");
    let mut w = tessera();
    w.args(["worker", "--slots", "2", "--coordinator"])
        .arg(format!("http://127.0.0.1:{port}"))
        .arg("--command")
        .arg(format!(
            "slow=sh -c 'echo $$ >> {}; sleep 300'",
            pids.display()
        ))
        .arg("--spool")
        .arg(dir.join("w.spool"));
    let mut worker = Proc::start(w, dir, "worker");
    let started = Instant::now();
    let running = loop {
        let n = std::fs::read_to_string(&pids).unwrap_or_default();
        let ids: Vec<String> = n.lines().map(str::to_string).collect();
        if ids.len() == 2 {
            break ids;
        }
        assert!(
            started.elapsed() < Duration::from_secs(30),
            "{}",
            worker.output()
        );
        std::thread::sleep(Duration::from_millis(100));
    };
    worker.kill9();
    let gone = |pid: &str| !Path::new(&format!("/proc/{pid}")).exists() || zombie(pid);
    let started = Instant::now();
    while !running.iter().all(|p| gone(p)) {
        assert!(
            started.elapsed() < Duration::from_secs(10),
            "runs {running:?} outlived their worker"
        );
        std::thread::sleep(Duration::from_millis(100));
    }
}

fn zombie(pid: &str) -> bool {
    std::fs::read_to_string(format!("/proc/{pid}/stat"))
        .ok()
        .and_then(|s| {
            s.rfind(')')
                .map(|i| s[i + 1..].trim_start().starts_with('Z'))
        })
        .unwrap_or(true)
}
