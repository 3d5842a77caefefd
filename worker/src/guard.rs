//! The guard: a small supervising process between the worker and each
//! external run, so that a run leaves nothing behind (Linux).
//!
//! The worker starts `tessera guard -- COMMAND...` instead of the command
//! itself (see `RunnerConfig::guard`). The guard
//!
//! 1. asks the kernel for SIGTERM when its parent, the worker, dies
//!    (`PR_SET_PDEATHSIG`): a worker killed with SIGKILL takes its runs
//!    with it;
//! 2. makes itself the *child subreaper* of the run (`PR_SET_CHILD_SUBREAPER`):
//!    a descendant that detaches (double fork, `setsid`, `nohup ... &`) is
//!    re-parented to the guard rather than to init, so it can still be found;
//! 3. runs the command with the guard's own standard input, output and error
//!    and in the guard's process group (the worker kills that group on a
//!    timeout or cancel);
//! 4. when the command exits, or on SIGTERM or SIGINT, kills every process
//!    that descends from the guard, reaps them, and exits with the command's
//!    exit code (or dies of the same signal).
//!
//! Descendants are found by walking the parent links in `/proc`; nothing
//! else is needed (no cgroups, no privileges). Where `/proc` or the two
//! `prctl` calls are missing, the guard still runs the command and kills
//! what it can find.

use std::collections::BTreeMap;
use std::process::ExitStatus;
use std::time::{Duration, Instant};

use rustix::process::{Pid, Signal};

/// The first line the guard prints on stderr when the command cannot be
/// started, so that the worker can report it as a start failure.
pub const CANNOT_START: &str = "tessera guard: cannot start";

/// Longest the guard keeps killing descendants after the command ended
/// (new ones can appear while a parent dies and its children are re-parented).
const CLEAN_UP_FOR: Duration = Duration::from_secs(2);

/// Parent of every process, read from `/proc/<pid>/stat`.
fn parents() -> BTreeMap<i32, i32> {
    let mut out = BTreeMap::new();
    let Ok(dir) = std::fs::read_dir("/proc") else {
        return out;
    };
    for entry in dir.flatten() {
        let Some(pid) = entry
            .file_name()
            .to_str()
            .and_then(|s| s.parse::<i32>().ok())
        else {
            continue;
        };
        let Ok(stat) = std::fs::read_to_string(entry.path().join("stat")) else {
            continue;
        };
        // "pid (comm) state ppid ...": comm may hold spaces and parentheses.
        let Some(rest) = stat.rfind(')').map(|i| &stat[i + 1..]) else {
            continue;
        };
        let mut fields = rest.split_whitespace();
        let _state = fields.next();
        if let Some(ppid) = fields.next().and_then(|s| s.parse::<i32>().ok()) {
            out.insert(pid, ppid);
        }
    }
    out
}

/// Every process that descends from `root` (not `root` itself).
pub fn descendants(root: i32) -> Vec<i32> {
    let parents = parents();
    let mut children: BTreeMap<i32, Vec<i32>> = BTreeMap::new();
    for (&pid, &ppid) in &parents {
        children.entry(ppid).or_default().push(pid);
    }
    let mut out = Vec::new();
    let mut todo = vec![root];
    while let Some(p) = todo.pop() {
        if let Some(kids) = children.get(&p) {
            for &k in kids {
                if !out.contains(&k) {
                    out.push(k);
                    todo.push(k);
                }
            }
        }
    }
    out
}

/// Kills every descendant of this process and reaps them, until none is
/// left (or two seconds have passed). Returns how many were killed.
pub fn kill_descendants() -> usize {
    let me = rustix::process::getpid().as_raw_nonzero().get();
    let started = Instant::now();
    let mut killed = 0;
    loop {
        let found = descendants(me);
        for &p in &found {
            if let Some(pid) = Pid::from_raw(p) {
                if rustix::process::kill_process(pid, Signal::KILL).is_ok() {
                    killed += 1;
                }
            }
        }
        // Reap whatever has ended (our children, including re-parented orphans).
        while let Ok(Some(_)) = rustix::process::waitpid(None, rustix::process::WaitOptions::NOHANG)
        {
        }
        if found.is_empty() || started.elapsed() > CLEAN_UP_FOR {
            return killed;
        }
        std::thread::sleep(Duration::from_millis(10));
    }
}

/// The exit code to leave with when the command ended with `status`; a
/// command killed by a signal is mirrored by dying of the same signal where
/// possible (128 + signal otherwise).
fn finish(status: ExitStatus) -> i32 {
    use std::os::unix::process::ExitStatusExt;
    if let Some(code) = status.code() {
        return code;
    }
    let sig = status.signal().unwrap_or(9);
    if let Some(s) = Signal::from_named_raw(sig) {
        // SIGTERM and SIGINT have handlers here; other signals kill us.
        let _ = rustix::process::kill_process(rustix::process::getpid(), s);
        std::thread::sleep(Duration::from_millis(100));
    }
    128 + sig
}

/// Runs `words` under the guard and returns the exit code to leave with.
pub fn run(words: &[String]) -> i32 {
    let Some(program) = words.first() else {
        eprintln!("{CANNOT_START}: no command given");
        return 127;
    };
    // 1. Die with the worker (and not start at all if it is already gone).
    let parent = rustix::process::getppid();
    let _ = rustix::process::set_parent_process_death_signal(Some(Signal::TERM));
    if rustix::process::getppid() != parent {
        return 143;
    }
    // 2. Orphans of the run come to us.
    let _ = rustix::process::set_child_subreaper(Some(rustix::process::getpid()));
    let rt = match tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
    {
        Ok(rt) => rt,
        Err(e) => {
            eprintln!("{CANNOT_START}: no async runtime: {e}");
            return 127;
        }
    };
    let ended = rt.block_on(async {
        use tokio::signal::unix::{signal, SignalKind};
        let (Ok(mut term), Ok(mut int)) = (
            signal(SignalKind::terminate()),
            signal(SignalKind::interrupt()),
        ) else {
            eprintln!("{CANNOT_START}: cannot handle signals");
            return Err(127);
        };
        let mut child = match tokio::process::Command::new(program)
            .args(&words[1..])
            .spawn()
        {
            Ok(c) => c,
            Err(e) => {
                let code = if e.kind() == std::io::ErrorKind::NotFound {
                    127
                } else {
                    126
                };
                eprintln!("{CANNOT_START} {program:?}: {e}");
                return Err(code);
            }
        };
        tokio::select! {
            s = child.wait() => Ok(s),
            _ = term.recv() => Err(143),
            _ = int.recv() => Err(130),
        }
    });
    // 4. Nothing of the run may outlive it.
    kill_descendants();
    match ended {
        Ok(Ok(status)) => finish(status),
        Ok(Err(e)) => {
            eprintln!("tessera guard: lost track of {program:?}: {e}");
            127
        }
        Err(code) => code,
    }
}
