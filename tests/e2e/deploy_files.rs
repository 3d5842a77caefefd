//! The files in `deploy/` use only options `tessera` really has, and the
//! shell scripts parse.

use crate::harness::tessera;
use std::path::Path;

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
            .position(|w| w.ends_with("tessera") || w == "args:")
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
        "systemd/tessera-worker.service",
        "slurm/tessera-workers.sbatch",
        "kubernetes/coordinator.yaml",
        "kubernetes/workers.yaml",
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
