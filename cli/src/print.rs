//! Printing that cannot panic. `println!` and `eprintln!` panic when their stream fails, as
//! standard output does when it is a pipe closed early (`ptacorr null ... | head`). Here a
//! failed stream stops that stream's printing quietly and the command goes on: its files are
//! written and its exit status is what it would have been. `outln!` and `errln!` (defined in
//! main.rs) are the CLI's only ways to print; tests/tests/rules.rs checks that.

use std::io::Write;
use std::sync::atomic::{AtomicBool, Ordering};

/// Set once a write to standard output (0) or standard error (1) has failed.
static CLOSED: [AtomicBool; 2] = [AtomicBool::new(false), AtomicBool::new(false)];

/// Write one line to standard output or standard error; after a failure, nothing more.
pub fn line(to_stderr: bool, args: std::fmt::Arguments) {
    let closed = &CLOSED[usize::from(to_stderr)];
    if closed.load(Ordering::Relaxed) {
        return;
    }
    let written = if to_stderr {
        let mut e = std::io::stderr().lock();
        e.write_fmt(args).and_then(|()| e.write_all(b"\n"))
    } else {
        let mut o = std::io::stdout().lock();
        o.write_fmt(args)
            .and_then(|()| o.write_all(b"\n"))
            .and_then(|()| o.flush())
    };
    if written.is_err() {
        closed.store(true, Ordering::Relaxed);
    }
}
