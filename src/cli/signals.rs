//! Interruptions: on Ctrl-C (SIGINT), SIGTERM or SIGHUP the temporary files of the outputs not
//! yet finished are removed, and the process exits with the conventional code, 128 plus the
//! signal's number (130, 143, 129).
//!
//! signal-hook runs the handling on a thread of its own, in safe code: a signal handler
//! proper may do almost nothing (no locks, no allocation), while removing files needs both.

/// Install the handler; it lasts as long as the process.
#[cfg(unix)]
pub fn remove_unfinished_outputs_on_interrupt() {
    use signal_hook::consts::{SIGHUP, SIGINT, SIGTERM};
    // Without a handler (it could not be installed) the signals keep their default action:
    // the run ends, leaving its temporary files.
    let Ok(mut signals) = signal_hook::iterator::Signals::new([SIGINT, SIGTERM, SIGHUP]) else {
        return;
    };
    std::thread::spawn(move || {
        if let Some(signal) = signals.forever().next() {
            cistern::io::output::remove_unfinished();
            std::process::exit(128 + signal);
        }
    });
}

/// Elsewhere the signals keep their default action.
#[cfg(not(unix))]
pub fn remove_unfinished_outputs_on_interrupt() {}
