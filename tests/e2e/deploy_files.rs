//! The files in `deploy/` use only options `tessera` really has, the
//! shell scripts parse, the systemd units pass `systemd-analyze verify`,
//! the Kubernetes manifests validate against the API schemas
//! (kubernetes-validate, strict) and the Containerfile passes its linter
//! (hadolint). The outside tools are installed by `.ci/run`
//! (`TESSERA_REQUIRE_TOOLS=1` there); elsewhere their checks are skipped
//! with a message. The Slurm scripts run on a real Slurm in `slurm.rs`.

use crate::harness::{tessera, text, tools_required};
use std::path::{Path, PathBuf};
use std::process::Command;

/// Every `--option` that follows a `tessera [global options] SUBCOMMAND` in a
/// deploy file, with the subcommand.
fn command_lines(text: &str) -> Vec<(String, Vec<String>)> {
    let mut out = Vec::new();
    // Join shell continuation lines and YAML arg lists into plain words.
    let flat = text.replace("\\\n", " ");
    for line in flat.lines() {
        let words: Vec<String> = line
            .split(|c: char| c.is_whitespace() || c == '[' || c == ']' || c == ',' || c == '=')
            .map(|w| w.trim_matches('"').to_string())
            .filter(|w| !w.is_empty())
            .collect();
        let Some(start) = words
            .iter()
            .position(|w| w.ends_with("tessera") || w == "$TESSERA" || w == "args:")
        else {
            continue;
        };
        let rest = &words[start + 1..];
        let sub = rest
            .iter()
            .enumerate()
            .find(|(i, w)| {
                ["serve", "worker", "run", "status"].contains(&w.as_str())
                    && (*i == 0 || !rest[i - 1].starts_with("--log"))
            })
            .map(|(_, w)| w.clone());
        if let Some(sub) = sub {
            let flags = rest
                .iter()
                .filter(|w| w.starts_with("--"))
                .cloned()
                .collect();
            out.push((sub, flags));
        }
    }
    out
}

#[test]
fn deploy_files_use_only_real_options_and_scripts_parse() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("deploy");
    let files = [
        "systemd/tessera-coordinator.service",
        "systemd/tessera-worker@.service",
        "slurm/tessera-workers.sbatch",
        "slurm/tessera-coordinator.sbatch",
        "kubernetes/coordinator.yaml",
        "kubernetes/workers-deployment.yaml",
        "kubernetes/workers-job.yaml",
    ];
    let mut checked = 0;
    for f in files {
        let text = std::fs::read_to_string(root.join(f)).unwrap_or_else(|e| panic!("{f}: {e}"));
        let lines = command_lines(&text);
        assert!(!lines.is_empty(), "{f}: no tessera command found");
        for (sub, flags) in lines {
            let help = tessera()
                .args([sub.as_str(), "--help"])
                .output()
                .expect("help");
            let global = tessera().arg("--help").output().expect("help");
            let known = format!(
                "{}{}",
                String::from_utf8_lossy(&help.stdout),
                String::from_utf8_lossy(&global.stdout)
            );
            for flag in flags {
                assert!(
                    known.contains(&flag),
                    "{f}: `tessera {sub}` has no option {flag}"
                );
                checked += 1;
            }
        }
        if f.ends_with(".sbatch") {
            let status = std::process::Command::new("bash")
                .arg("-n")
                .arg(root.join(f))
                .status()
                .expect("bash -n");
            assert!(status.success(), "{f} does not parse");
        }
    }
    assert!(checked >= 20, "only {checked} options checked");
}

fn deploy_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("deploy")
}

/// An outside tool: next to `TESSERA_PYTHON` (the CI venv), else on PATH.
fn tool(name: &str) -> Option<PathBuf> {
    if let Ok(py) = std::env::var("TESSERA_PYTHON") {
        if let Some(dir) = Path::new(&py).parent() {
            let p = dir.join(name);
            if p.is_file() {
                return Some(p);
            }
        }
    }
    let out = Command::new("sh")
        .args(["-c", &format!("command -v {name}")])
        .output()
        .ok()?;
    let path = text(&out.stdout).trim().to_string();
    (out.status.success() && !path.is_empty()).then(|| PathBuf::from(path))
}

fn skip_or_fail(name: &str) {
    assert!(
        !tools_required(),
        "{name} is required (TESSERA_REQUIRE_TOOLS) but not found"
    );
    eprintln!("skipped: {name} is not installed; .ci/run installs it");
}

// systemd-analyze verify prints a line for every unknown key, bad value or
// missing executable and exits non-zero for some of them: a unit passes when
// it exits 0 and prints nothing. The binary path is the one built for the
// tests (the units name /usr/local/bin/tessera).
#[test]
fn systemd_units_pass_systemd_analyze_verify() {
    let Some(analyze) = tool("systemd-analyze") else {
        return skip_or_fail("systemd-analyze");
    };
    let tmp = tempfile::tempdir().expect("temp dir");
    let mut units = 0;
    for entry in std::fs::read_dir(deploy_dir().join("systemd")).expect("systemd dir") {
        let path = entry.expect("entry").path();
        if path.extension().is_none_or(|e| e != "service") {
            continue;
        }
        let name = path.file_name().expect("name").to_owned();
        let unit = std::fs::read_to_string(&path)
            .expect("unit")
            .replace("/usr/local/bin/tessera", env!("CARGO_BIN_EXE_tessera"));
        let copy = tmp.path().join(&name);
        std::fs::write(&copy, unit).expect("copy");
        let out = Command::new(&analyze)
            .arg("verify")
            .arg(&copy)
            .output()
            .expect("systemd-analyze");
        let said = format!("{}{}", text(&out.stdout), text(&out.stderr));
        assert!(
            out.status.success() && said.trim().is_empty(),
            "{}: systemd-analyze verify says:\n{said}",
            path.display()
        );
        units += 1;
    }
    assert!(units >= 2, "{units} units");
    assert!(deploy_dir()
        .join("systemd/tessera-worker@.service")
        .is_file());
    // The check finds real mistakes: a misspelt key is reported.
    let bad = tmp.path().join("bad.service");
    std::fs::write(&bad, "[Service]\nExecStart=/bin/true\nNicee=15\n").expect("bad unit");
    let out = Command::new(&analyze)
        .arg("verify")
        .arg(&bad)
        .output()
        .expect("verify");
    assert!(
        text(&out.stderr).contains("Nicee"),
        "a misspelt key goes unnoticed"
    );
}

// Every manifest against the Kubernetes API schemas, strictly (unknown
// fields are errors): kubernetes-validate from PyPI, offline.
#[test]
fn kubernetes_manifests_validate_against_the_api() {
    let Some(validate) = tool("kubernetes-validate") else {
        return skip_or_fail("kubernetes-validate");
    };
    let dir = deploy_dir().join("kubernetes");
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .expect("kubernetes dir")
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.extension().is_some_and(|e| e == "yaml"))
        .collect();
    files.sort();
    assert!(files.len() >= 5, "{files:?}");
    let out = Command::new(&validate)
        .arg("--strict")
        .args(&files)
        .output()
        .expect("kubernetes-validate");
    let said = format!("{}{}", text(&out.stdout), text(&out.stderr));
    assert!(out.status.success(), "kubernetes-validate:\n{said}");
    for kind in ["statefulset/", "service/", "deployment/", "job/", "secret/"] {
        assert!(said.contains(kind), "no {kind} validated:\n{said}");
    }
    let all: String = files
        .iter()
        .map(|f| std::fs::read_to_string(f).unwrap_or_default())
        .collect();
    assert!(
        all.contains("volumeClaimTemplates"),
        "the database is on a claim template"
    );
    assert!(all.contains("completionMode: Indexed"), "an indexed Job");
    assert!(all.matches("grpc:").count() >= 2, "gRPC probes");
    assert!(
        all.contains("image: tessera:0.1.0"),
        "the image the Containerfile builds"
    );
}

#[test]
fn containerfile_passes_the_linter() {
    let Some(hadolint) = tool("hadolint") else {
        return skip_or_fail("hadolint");
    };
    let file = deploy_dir().join("Containerfile");
    let out = Command::new(&hadolint)
        .arg("--no-color")
        .arg(&file)
        .output()
        .expect("hadolint");
    assert!(
        out.status.success(),
        "hadolint:\n{}{}",
        text(&out.stdout),
        text(&out.stderr)
    );
    let body = std::fs::read_to_string(&file).expect("Containerfile");
    assert!(body.contains("USER 10001"), "runs as a non-root user");
    assert!(body.contains("AS build"), "multi-stage");
}
