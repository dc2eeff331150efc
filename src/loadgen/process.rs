//! What a server process costs, read from Linux's /proc: CPU time (user + system, every thread)
//! and resident memory.

use std::path::PathBuf;
use std::process::Command;

/// Clock ticks per second assumed when `getconf CLK_TCK` cannot be run: USER_HZ, which Linux fixes
/// at 100 on every mainstream architecture.
pub const DEFAULT_CLOCK_TICKS: u64 = 100;

/// Why /proc could not be read.
#[derive(Debug, thiserror::Error)]
pub enum ProcError {
    /// The file is missing or unreadable (no such process, or not Linux).
    #[error("cannot read {path}: {source}")]
    Read {
        /// The /proc file.
        path: PathBuf,
        /// The I/O error.
        source: std::io::Error,
    },
    /// The file's content is not what the kernel writes.
    #[error("{path}: unexpected content: {reason}")]
    Parse {
        /// The /proc file.
        path: PathBuf,
        /// What was missing.
        reason: String,
    },
}

fn read(path: PathBuf) -> Result<(PathBuf, String), ProcError> {
    match std::fs::read_to_string(&path) {
        Ok(text) => Ok((path, text)),
        Err(source) => Err(ProcError::Read { path, source }),
    }
}

/// utime + stime of process `pid` (all its threads), in clock ticks.
///
/// # Errors
/// [`ProcError`] when /proc/PID/stat is missing or malformed.
pub fn cpu_ticks(pid: u32) -> Result<u64, ProcError> {
    let (path, text) = read(PathBuf::from(format!("/proc/{pid}/stat")))?;
    parse_cpu_ticks(&text).map_err(|reason| ProcError::Parse { path, reason })
}

/// utime + stime from the text of /proc/PID/stat. The command name (field 2) is in parentheses
/// and may hold spaces or ')' itself, so fields are counted after the last ')': field 3 (state)
/// comes first, utime is field 14 and stime field 15.
fn parse_cpu_ticks(text: &str) -> Result<u64, String> {
    let after = text
        .rfind(')')
        .map(|i| &text[i + 1..])
        .ok_or("no ')' after the command name")?;
    let fields: Vec<&str> = after.split_whitespace().collect();
    let field = |n: usize| -> Result<u64, String> {
        let s = fields.get(n - 3).ok_or(format!("field {n} is missing"))?;
        s.parse()
            .map_err(|e| format!("field {n} = {s:?} is not a count: {e}"))
    };
    Ok(field(14)? + field(15)?)
}

/// Clock ticks per second (`getconf CLK_TCK`), or [`DEFAULT_CLOCK_TICKS`] when that fails.
pub fn clock_ticks_per_sec() -> u64 {
    Command::new("getconf")
        .arg("CLK_TCK")
        .output()
        .ok()
        .filter(|o| o.status.success())
        .and_then(|o| String::from_utf8(o.stdout).ok())
        .and_then(|s| s.trim().parse().ok())
        .filter(|&t: &u64| t > 0)
        .unwrap_or(DEFAULT_CLOCK_TICKS)
}

/// Resident memory (VmRSS) of process `pid`, in bytes.
///
/// # Errors
/// [`ProcError`] when /proc/PID/status is missing or has no VmRSS line.
pub fn resident_bytes(pid: u32) -> Result<u64, ProcError> {
    let (path, text) = read(PathBuf::from(format!("/proc/{pid}/status")))?;
    parse_kib_field(&text, "VmRSS:")
        .map(|kib| kib * 1024)
        .map_err(|reason| ProcError::Parse { path, reason })
}

/// Peak resident memory (VmHWM) of process `pid`, in bytes.
///
/// # Errors
/// [`ProcError`] when /proc/PID/status is missing or has no VmHWM line.
pub fn peak_resident_bytes(pid: u32) -> Result<u64, ProcError> {
    let (path, text) = read(PathBuf::from(format!("/proc/{pid}/status")))?;
    parse_kib_field(&text, "VmHWM:")
        .map(|kib| kib * 1024)
        .map_err(|reason| ProcError::Parse { path, reason })
}

fn parse_kib_field(text: &str, key: &str) -> Result<u64, String> {
    let line = text
        .lines()
        .find(|l| l.starts_with(key))
        .ok_or(format!("no {key} line"))?;
    let mut words = line[key.len()..].split_whitespace();
    match (words.next(), words.next()) {
        (Some(n), Some("kB")) => n
            .parse()
            .map_err(|e| format!("{key} {n:?} is not a count: {e}")),
        _ => Err(format!("{key} line {line:?} is not '<n> kB'")),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn stat_fields_are_counted_after_the_command_name() {
        // proc(5): pid (comm) state ppid pgrp session tty_nr tpgid flags minflt cminflt majflt
        // cmajflt utime stime ...; a command name with a space and a ')'.
        let text = "4242 (tokio ) worker) S 1 4242 4242 0 -1 4194560 1500 0 0 0 731 129 0 0 20 0";
        assert_eq!(parse_cpu_ticks(text), Ok(731 + 129));
        assert!(parse_cpu_ticks("4242 (x) S 1 2").is_err());
        assert!(parse_cpu_ticks("no parenthesis").is_err());
    }

    #[test]
    #[cfg(target_os = "linux")]
    fn this_process_can_be_read() {
        let me = std::process::id();
        assert!(cpu_ticks(me).is_ok());
        let rss = resident_bytes(me).unwrap();
        assert!(rss > 0);
        // The high-water mark never falls, so read after the current value it is at least as big.
        assert!(peak_resident_bytes(me).unwrap() >= rss);
        assert!(clock_ticks_per_sec() > 0);
    }

    #[test]
    fn vmrss_lines_are_parsed_in_kib() {
        let text = "Name:\tcandor\nVmHWM:\t  9000 kB\nVmRSS:\t   8120 kB\n";
        assert_eq!(parse_kib_field(text, "VmRSS:"), Ok(8120));
        assert_eq!(parse_kib_field(text, "VmHWM:"), Ok(9000));
        assert!(parse_kib_field("VmRSS: 12 MB\n", "VmRSS:").is_err());
        assert!(parse_kib_field("Name: x\n", "VmRSS:").is_err());
    }
}
