//! The daemon's messages on stderr: one line per message, whatever the
//! names in it hold. A frame named `a\nERROR ...pbm` must not forge a line
//! of its own in the journal, and a name full of terminal control codes
//! must not drive the reader's terminal.
//!
//! [`OneLine`] wraps the writer the message formatter writes to: each
//! message arrives as one write ending in a newline; every other newline,
//! carriage return and control character in it is written escaped (`\n`,
//! `\r`, `\u{1b}`...). Pure apart from the writer it wraps.
//!
//! Invariant: what reaches the inner writer holds a newline only at the end
//! of a write; escape sequences are kept only when the formatter's own
//! colours are on (a terminal), never otherwise.

use std::io::{self, Write};

/// A writer that keeps each message on one line (see the module docs).
pub struct OneLine<W> {
    inner: W,
    /// Whether the escape character passes (the formatter's colours).
    ansi: bool,
}

impl<W: Write> OneLine<W> {
    pub fn new(inner: W, ansi: bool) -> OneLine<W> {
        OneLine { inner, ansi }
    }
}

/// `buf` with its control characters escaped, but a final newline and
/// tabs (and the escape character when `ansi`).
pub fn escape(buf: &[u8], ansi: bool) -> std::borrow::Cow<'_, [u8]> {
    let last = buf.len().saturating_sub(1);
    let bad = |i: usize, b: u8| {
        (b < 0x20 || b == 0x7f) && b != b'\t' && !(b == b'\n' && i == last) && !(ansi && b == 0x1b)
    };
    if !buf.iter().enumerate().any(|(i, &b)| bad(i, b)) {
        return std::borrow::Cow::Borrowed(buf);
    }
    let mut out = Vec::with_capacity(buf.len() + 16);
    for (i, &b) in buf.iter().enumerate() {
        if !bad(i, b) {
            out.push(b);
            continue;
        }
        match b {
            b'\n' => out.extend_from_slice(b"\\n"),
            b'\r' => out.extend_from_slice(b"\\r"),
            _ => out.extend_from_slice(format!("\\u{{{b:x}}}").as_bytes()),
        }
    }
    std::borrow::Cow::Owned(out)
}

impl<W: Write> Write for OneLine<W> {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        self.inner.write_all(&escape(buf, self.ansi))?;
        Ok(buf.len())
    }

    fn flush(&mut self) -> io::Result<()> {
        self.inner.flush()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_name_cannot_forge_a_line() {
        let mut out = Vec::new();
        let mut w = OneLine::new(&mut out, false);
        w.write_all(b"WARN cannot read frame=/in/a\nERROR forged.pbm\r\x1b[2J\n")
            .unwrap();
        assert_eq!(
            String::from_utf8(out).unwrap(),
            "WARN cannot read frame=/in/a\\nERROR forged.pbm\\r\\u{1b}[2J\n"
        );
        // Colours on: the formatter's escape sequences pass; a plain
        // message is written as it is.
        assert_eq!(
            &*escape(b"\x1b[33mWARN\x1b[0m x\n", true),
            b"\x1b[33mWARN\x1b[0m x\n"
        );
        assert!(matches!(
            escape(b"INFO ok\tfine\n", false),
            std::borrow::Cow::Borrowed(_)
        ));
    }
}
