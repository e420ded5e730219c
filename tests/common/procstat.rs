//! CPU time of processes from /proc (Linux), for the load and chaos runs' figures.

use std::process::Command;

/// Clock ticks per second of /proc's times (`getconf CLK_TCK`; 100 when it cannot be asked).
pub fn clock_ticks() -> f64 {
    Command::new("getconf")
        .arg("CLK_TCK")
        .output()
        .ok()
        .and_then(|o| String::from_utf8(o.stdout).ok())
        .and_then(|t| t.trim().parse().ok())
        .unwrap_or(100.0)
}

/// Fields 14–17 of /proc/PID/stat in seconds: user and system time of the process itself, then of
/// the children it has waited for. `pid` may be `self`.
pub fn cpu_times(pid: &str, ticks: f64) -> Option<[f64; 4]> {
    let text = std::fs::read_to_string(format!("/proc/{pid}/stat")).ok()?;
    // The command name (field 2) is in parentheses and may hold spaces: count fields after it.
    let rest = &text[text.rfind(')')? + 1..];
    let fields: Vec<&str> = rest.split_whitespace().collect();
    // utime, stime, cutime and cstime are fields 14 to 17 of the whole line, 12 to 15 after the name.
    let field = |i: usize| -> Option<f64> { Some(fields.get(i)?.parse::<f64>().ok()? / ticks) };
    Some([field(11)?, field(12)?, field(13)?, field(14)?])
}

/// The parent's pid of a process (field 4 of /proc/PID/stat).
pub fn parent_pid(pid: &str) -> Option<String> {
    let text = std::fs::read_to_string(format!("/proc/{pid}/stat")).ok()?;
    let rest = &text[text.rfind(')')? + 1..];
    rest.split_whitespace().nth(1).map(str::to_string)
}
