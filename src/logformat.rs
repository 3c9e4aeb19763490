//! Where and how the binary's `tracing` log is written: text lines, JSON lines or the systemd journal's native
//! protocol, and the `auto` rule that picks one from how stderr is connected.
//!
//! The choice is a pure function of the requested format, `JOURNAL_STREAM` and stderr's identity, so it is unit
//! tested here without systemd; only `install` touches the process (stderr, the journal socket, the global
//! subscriber).

use std::io::{self, IsTerminal};
use tracing_subscriber::layer::SubscriberExt;
use tracing_subscriber::util::SubscriberInitExt;
use tracing_subscriber::EnvFilter;

/// Where `tracing-journald` sends its datagrams (fixed in that crate); named here only for the fallback warning.
const JOURNAL_SOCKET: &str = "/run/systemd/journal/socket";

/// The log format asked for on the command line (`--log-format`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, clap::ValueEnum)]
pub enum LogFormat {
    /// The journal when stderr is connected to it (systemd's JOURNAL_STREAM), else text.
    #[default]
    Auto,
    /// Human-readable lines on stderr, coloured only on a terminal.
    Text,
    /// One JSON object per line on stderr: timestamp, level, target, message and the event's fields.
    Json,
    /// The systemd journal's native protocol: fields become journal fields, levels become priorities.
    Journald,
}

/// What the log is actually written as, once `auto` and the terminal check are settled.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Sink {
    Text { ansi: bool },
    Json,
    Journald,
}

/// Whether stderr is the journal stream systemd set up: `JOURNAL_STREAM` is `<device>:<inode>` in decimal, and it
/// counts only if it equals stderr's own (device, inode). systemd.exec(5) asks for this comparison rather than
/// the variable's mere presence, because a child whose stderr was redirected (a pipe, a file) still inherits it.
pub fn stderr_is_journal(journal_stream: Option<&str>, stderr: Option<(u64, u64)>) -> bool {
    let (Some(value), Some(stderr)) = (journal_stream, stderr) else {
        return false;
    };
    let Some((dev, ino)) = value.split_once(':') else {
        return false;
    };
    match (dev.parse::<u64>(), ino.parse::<u64>()) {
        (Ok(dev), Ok(ino)) => (dev, ino) == stderr,
        _ => false,
    }
}

/// Settles the format: `auto` is the journal when stderr is the journal stream, else text; text is coloured only
/// when stderr is a terminal, so a pipe or a log file never gets escape codes.
pub fn resolve(
    format: LogFormat,
    journal_stream: Option<&str>,
    stderr: Option<(u64, u64)>,
    stderr_is_terminal: bool,
) -> Sink {
    let text = Sink::Text {
        ansi: stderr_is_terminal,
    };
    match format {
        LogFormat::Text => text,
        LogFormat::Json => Sink::Json,
        LogFormat::Journald => Sink::Journald,
        LogFormat::Auto if stderr_is_journal(journal_stream, stderr) => Sink::Journald,
        LogFormat::Auto => text,
    }
}

/// Stderr's (device, inode), as fstat reports them; None if stderr is closed.
fn stderr_identity() -> Option<(u64, u64)> {
    use std::os::fd::AsFd;
    use std::os::unix::fs::MetadataExt;
    // A duplicate, so that dropping the File closes only the copy, never stderr itself.
    let fd = io::stderr().as_fd().try_clone_to_owned().ok()?;
    let meta = std::fs::File::from(fd).metadata().ok()?;
    Some((meta.dev(), meta.ino()))
}

/// Installs the global subscriber for `format` with `filter`. A second call (or a subscriber already set) is
/// ignored. If the journal socket cannot be opened, the log goes to stderr as JSON lines, so it stays structured,
/// and the first line says why.
pub fn install(format: LogFormat, filter: EnvFilter) {
    let journal_stream = std::env::var("JOURNAL_STREAM").ok();
    let sink = resolve(
        format,
        journal_stream.as_deref(),
        stderr_identity(),
        io::stderr().is_terminal(),
    );
    match sink {
        Sink::Text { ansi } => {
            let _ = tracing_subscriber::fmt()
                .with_env_filter(filter)
                .with_writer(io::stderr)
                .with_ansi(ansi)
                .try_init();
        }
        Sink::Json => install_json(filter),
        Sink::Journald => match tracing_journald::layer() {
            Ok(journal) => {
                let _ = tracing_subscriber::registry()
                    .with(filter)
                    .with(journal)
                    .try_init();
            }
            Err(e) => {
                install_json(filter);
                tracing::warn!(
                    socket = JOURNAL_SOCKET,
                    error = %e,
                    "cannot open the systemd journal socket, logging JSON lines to stderr instead"
                );
            }
        },
    }
}

fn install_json(filter: EnvFilter) {
    // Flattened, so `message` and the event's fields sit beside `level` instead of under a `fields` object.
    let _ = tracing_subscriber::fmt()
        .json()
        .flatten_event(true)
        .with_env_filter(filter)
        .with_writer(io::stderr)
        .with_ansi(false)
        .try_init();
}

#[cfg(test)]
mod tests {
    use super::*;

    // Device and inode pairs are the tests' own construction; the "<dev>:<ino>" decimal form is systemd.exec(5)'s.
    const STDERR: (u64, u64) = (8, 306_630);

    #[test]
    fn journal_only_when_device_and_inode_both_match() {
        assert!(stderr_is_journal(Some("8:306630"), Some(STDERR)));
        assert!(!stderr_is_journal(Some("8:306631"), Some(STDERR)));
        assert!(!stderr_is_journal(Some("9:306630"), Some(STDERR)));
        // Swapped fields are a different identity, not a match.
        assert!(!stderr_is_journal(Some("306630:8"), Some(STDERR)));
    }

    #[test]
    fn journal_needs_both_the_variable_and_a_stderr() {
        assert!(!stderr_is_journal(None, Some(STDERR)));
        assert!(!stderr_is_journal(Some("8:306630"), None));
        assert!(!stderr_is_journal(None, None));
    }

    #[test]
    fn malformed_journal_stream_never_matches() {
        for bad in [
            "",
            "8",
            "8:",
            ":306630",
            "8:306630:1",
            "8 :306630",
            "0x8:306630",
            "-8:306630",
            "8:3066300000000000000000000",
        ] {
            assert!(!stderr_is_journal(Some(bad), Some(STDERR)), "{bad:?}");
        }
    }

    #[test]
    fn auto_picks_journal_or_text() {
        let matching = Some("8:306630");
        let other = Some("8:1");
        assert_eq!(
            resolve(LogFormat::Auto, matching, Some(STDERR), false),
            Sink::Journald
        );
        // The variable inherited by a process whose stderr now goes elsewhere.
        assert_eq!(
            resolve(LogFormat::Auto, other, Some(STDERR), false),
            Sink::Text { ansi: false }
        );
        assert_eq!(
            resolve(LogFormat::Auto, None, Some(STDERR), true),
            Sink::Text { ansi: true }
        );
    }

    #[test]
    fn explicit_formats_ignore_the_journal_stream() {
        let matching = Some("8:306630");
        assert_eq!(
            resolve(LogFormat::Text, matching, Some(STDERR), false),
            Sink::Text { ansi: false }
        );
        assert_eq!(
            resolve(LogFormat::Text, None, None, true),
            Sink::Text { ansi: true }
        );
        assert_eq!(
            resolve(LogFormat::Json, matching, Some(STDERR), true),
            Sink::Json
        );
        assert_eq!(
            resolve(LogFormat::Journald, None, None, true),
            Sink::Journald
        );
    }
}
