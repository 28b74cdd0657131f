//! Terminal behaviour: colour only on a TTY and never with `NO_COLOR` set (the convention of
//! no-color.org), a progress line on stderr only on a TTY, nothing of it under `--quiet`, and
//! plain bytes whenever the output is a pipe. A TTY comes from util-linux's `script`, which
//! runs the command under a pseudo-terminal (skipped with a message where `script` is
//! missing, a failure under `CI=true`).

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;

use common::*;

fn sample(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-models").join(name)
}

fn have_script(test: &str) -> bool {
    let ok = Command::new("script")
        .args(["-qec", "true", "/dev/null"])
        .output()
        .map(|o| o.status.success())
        .unwrap_or(false);
    if !ok {
        if std::env::var("CI").is_ok_and(|v| v == "true") {
            panic!("{test}: util-linux `script` is required under CI=true (it provides the pseudo-terminal)");
        }
        println!("SKIPPED {test}: util-linux `script` is not installed");
    }
    ok
}

/// Runs tilecut under a pseudo-terminal; stdout and stderr arrive together.
fn on_tty(args: &[&str], env: &[(&str, &str)]) -> String {
    let quoted: Vec<String> = std::iter::once(env!("CARGO_BIN_EXE_tilecut").to_string())
        .chain(args.iter().map(|a| a.to_string()))
        .map(|a| format!("'{}'", a.replace('\'', "'\\''")))
        .collect();
    let mut cmd = Command::new("script");
    cmd.args(["-qec", &quoted.join(" "), "/dev/null"]);
    cmd.env_remove("NO_COLOR");
    for (k, v) in env {
        cmd.env(k, v);
    }
    let out = cmd.output().expect("script runs");
    String::from_utf8_lossy(&out.stdout).into_owned()
}

const ESC: &str = "\x1b[";

#[test]
fn colour_only_on_a_terminal_and_never_with_no_color() {
    if !have_script("colour_only_on_a_terminal_and_never_with_no_color") {
        return;
    }
    let m = sample("parcel_label_detector_qdq.onnx");
    let m = m.to_str().expect("utf8");
    // No progress line here, however slow the machine: only the colour is under test.
    let later = ("TILECUT_PROGRESS_AFTER_MS", "600000");
    let tty = on_tty(&["analyze", m], &[later]);
    assert!(tty.contains(ESC), "a terminal gets colour: {tty}");
    assert!(tty.contains("\x1b[32maccel\x1b[0m"), "accelerator partitions in green");
    let no_color = on_tty(&["analyze", m], &[("NO_COLOR", "1"), later]);
    assert!(!no_color.contains(ESC), "NO_COLOR set: no escape codes at all");
    // NO_COLOR set but empty does not count (no-color.org).
    let empty = on_tty(&["analyze", m], &[("NO_COLOR", ""), later]);
    assert!(empty.contains(ESC));
    let (_, piped, _) = run(&["analyze", m]);
    assert!(!piped.contains(ESC), "a pipe gets plain text");
    // The table carries the same words with and without colour.
    let strip = |s: &str| {
        let mut out = String::new();
        let mut chars = s.chars().peekable();
        while let Some(c) = chars.next() {
            if c == '\x1b' {
                for d in chars.by_ref() {
                    if d == 'm' {
                        break;
                    }
                }
            } else if c != '\r' {
                out.push(c);
            }
        }
        out
    };
    assert_eq!(strip(&tty), piped);
}

#[test]
fn progress_on_a_terminal_and_silence_under_quiet() {
    if !have_script("progress_on_a_terminal_and_silence_under_quiet") {
        return;
    }
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-models");
    let dir = dir.to_str().expect("utf8");
    let now = [("TILECUT_PROGRESS_AFTER_MS", "0")];
    let tty = on_tty(&["survey", dir, "--format", "csv"], &now);
    assert!(tty.contains("surveying ["), "progress bar expected: {tty}");
    assert!(tty.contains("10/10 models"));
    // The line is cleared before the report: the CSV header starts a clean line.
    assert!(tty.contains("\x1b[2Krank,blocker"), "{tty:?}");
    let quiet = on_tty(&["survey", dir, "--format", "csv", "--quiet"], &now);
    assert!(!quiet.contains("surveying"), "--quiet: no progress: {quiet}");
    let analyze = on_tty(&["analyze", &format!("{dir}/fruit_grader_qdq_int8.onnx")], &now);
    assert!(analyze.contains("analyze: "), "stage progress for analyze: {analyze}");
    // Piped stderr never gets a progress line, whatever the delay.
    let out = common::bin()
        .args(["survey", dir, "--format", "csv"])
        .env("TILECUT_PROGRESS_AFTER_MS", "0")
        .output()
        .expect("runs");
    assert!(out.stderr.is_empty(), "{}", String::from_utf8_lossy(&out.stderr));
}
