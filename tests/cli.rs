//! The command line as a shell uses it: `tailtally openapi | head -c 16` and the like must end quietly when
//! the reader goes away, with exit 0 and nothing on standard error (no panic, no backtrace).

use std::io::Read;
use std::process::{Command, Stdio};

fn openapi() -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_tailtally"));
    c.arg("openapi").env("RUST_BACKTRACE", "1").stdin(Stdio::null()).stderr(Stdio::piped());
    c
}

fn assert_quiet(out: std::process::Output) {
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(!stderr.contains("panicked"), "tailtally openapi panicked on a closed pipe:\n{stderr}");
    assert!(stderr.is_empty(), "tailtally openapi wrote to stderr on a closed pipe:\n{stderr}");
    assert!(out.status.success(), "tailtally openapi on a closed pipe: {}", out.status);
}

/// The reader takes a few bytes and leaves, as `head` does. The document is larger than a pipe's buffer
/// (64 KiB on Linux) at the time of writing, so the rest of the write meets the closed pipe.
#[test]
fn openapi_stops_quietly_when_the_reader_leaves_early() {
    let mut child = openapi().stdout(Stdio::piped()).spawn().unwrap();
    let mut stdout = child.stdout.take().unwrap();
    let mut head = [0u8; 16];
    stdout.read_exact(&mut head).unwrap();
    assert_eq!(head[0], b'{', "the document starts as JSON");
    drop(stdout);
    assert_quiet(child.wait_with_output().unwrap());
}

/// The reader is gone before the first byte is written, whatever the document's size: the first write
/// meets the closed end. (A socket pair, since the standard library's pipe is newer than the crate's
/// rust-version; writing to a socket whose peer is closed fails with EPIPE as a pipe does.)
#[cfg(unix)]
#[test]
fn openapi_stops_quietly_when_the_reader_is_already_gone() {
    use std::os::fd::OwnedFd;
    let (ours, theirs) = std::os::unix::net::UnixStream::pair().unwrap();
    drop(ours);
    let child = openapi().stdout(Stdio::from(OwnedFd::from(theirs))).spawn().unwrap();
    assert_quiet(child.wait_with_output().unwrap());
}

/// The whole document still arrives when the reader stays.
#[test]
fn openapi_prints_the_whole_document() {
    let out = openapi().stdout(Stdio::piped()).output().unwrap();
    assert!(out.status.success());
    let doc: serde_json::Value = serde_json::from_slice(&out.stdout).expect("the document is JSON");
    assert!(doc.get("openapi").is_some());
}
