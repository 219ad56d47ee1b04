//! What reaches the terminal.
//!
//! Owns: writing a command's output so that a reader who stops early (`tarn states N
//! --json | head -c 1`) ends the command quietly with exit 0, instead of the panic
//! `println!` raises on a closed pipe (Rust ignores SIGPIPE, so a closed pipe is the
//! write error `BrokenPipe`, which `is_closed` recognises anywhere in an error chain);
//! text that came from a worker made harmless for a terminal ([`visible`]); commands
//! printed so that a pasted line runs exactly the argument array ([`shell_line`],
//! [`tarn_line`]).

use std::borrow::Cow;
use std::io::Write;
use std::path::Path;

/// Writes `text` to stdout and flushes it.
pub fn write(text: &str) -> std::io::Result<()> {
    let mut out = std::io::stdout().lock();
    out.write_all(text.as_bytes())?;
    out.flush()
}

/// Writes `text` and a newline to stdout.
pub fn line(text: &str) -> std::io::Result<()> {
    let mut out = std::io::stdout().lock();
    out.write_all(text.as_bytes())?;
    out.write_all(b"\n")?;
    out.flush()
}

/// Whether an I/O error means the reader closed stdout.
pub fn is_closed(e: &std::io::Error) -> bool {
    e.kind() == std::io::ErrorKind::BrokenPipe
}

/// Whether any error in an `anyhow` chain is a closed stdout.
pub fn chain_is_closed(e: &anyhow::Error) -> bool {
    e.chain()
        .filter_map(|c| c.downcast_ref::<std::io::Error>())
        .any(is_closed)
}

/// `text` with every control character except newline and tab written as a visible
/// escape (`\x1b`, `\r`, `\u{9b}`), so that a worker's stderr, failure message or
/// metric name cannot clear the screen, retitle the terminal or overwrite a line.
pub fn visible(text: &str) -> Cow<'_, str> {
    if !text.chars().any(needs_escape) {
        return Cow::Borrowed(text);
    }
    let mut out = String::with_capacity(text.len() + 8);
    for c in text.chars() {
        if needs_escape(c) {
            match c {
                '\r' => out.push_str("\\r"),
                c if (c as u32) < 0x80 => out.push_str(&format!("\\x{:02x}", c as u32)),
                c => out.push_str(&format!("\\u{{{:x}}}", c as u32)),
            }
        } else {
            out.push(c);
        }
    }
    Cow::Owned(out)
}

fn needs_escape(c: char) -> bool {
    c.is_control() && c != '\n' && c != '\t'
}

/// One argument as a POSIX shell word: unchanged when it holds only characters no shell
/// treats specially, else in single quotes (a `'` inside becomes `'\''`). Control
/// characters are escaped visibly: such an argument cannot be pasted faithfully anyway.
pub fn shell_word(arg: &str) -> String {
    let plain = !arg.is_empty()
        && arg
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_./=:,+@%".contains(c));
    if plain {
        return visible(arg).into_owned();
    }
    format!("'{}'", visible(&arg.replace('\'', "'\\''")))
}

/// An argument array as one shell line that runs exactly that array.
pub fn shell_line<S: AsRef<str>>(argv: &[S]) -> String {
    argv.iter()
        .map(|a| shell_word(a.as_ref()))
        .collect::<Vec<_>>()
        .join(" ")
}

/// The state directory tarn uses when neither `--state` nor `TARN_STATE` names one.
pub const DEFAULT_STATE: &str = "state";

/// A `tarn` command line for a hint, with `--state DIR` when the state directory is not
/// the default, so that the line typed verbatim acts on the same campaign.
pub fn tarn_line(state_dir: &Path, args: &[&str]) -> String {
    let mut argv = vec!["tarn".to_string()];
    if state_dir != Path::new(DEFAULT_STATE) {
        argv.push("--state".into());
        argv.push(state_dir.display().to_string());
    }
    argv.extend(args.iter().map(|a| a.to_string()));
    shell_line(&argv)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn control_characters_become_visible_escapes() {
        assert_eq!(visible("plain text\n\tok"), "plain text\n\tok");
        assert_eq!(
            visible("\x1b[2J\x1b]0;pwned\x07done\r"),
            "\\x1b[2J\\x1b]0;pwned\\x07done\\r"
        );
        assert_eq!(visible("csi \u{9b}31m \u{7f}"), "csi \\u{9b}31m \\x7f");
        assert_eq!(visible("ünïcode ok"), "ünïcode ok");
    }

    #[test]
    fn shell_words_are_quoted_only_when_needed() {
        assert_eq!(shell_word("/usr/bin/python3"), "/usr/bin/python3");
        assert_eq!(shell_word("a b"), "'a b'");
        assert_eq!(shell_word("$(rm -rf ~)"), "'$(rm -rf ~)'");
        assert_eq!(shell_word("it's"), "'it'\\''s'");
        assert_eq!(shell_word(""), "''");
        assert_eq!(
            shell_line(&["python3", "w.py", "x; echo hi"]),
            "python3 w.py 'x; echo hi'"
        );
    }

    #[test]
    fn hints_name_the_state_directory_when_it_is_not_the_default() {
        assert_eq!(
            tarn_line(Path::new("state"), &["resume", "c"]),
            "tarn resume c"
        );
        assert_eq!(
            tarn_line(Path::new("/data/my runs"), &["resume", "c"]),
            "tarn --state '/data/my runs' resume c"
        );
    }
}
