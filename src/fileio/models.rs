//! Reading a model file, and saying what a wrong file is.
//!
//! A frame, a configuration or a label store given where a model belongs
//! is a common slip; rather than a JSON parser's "expected value at line 1
//! column 1", the error names what the file looks like and what was
//! expected. Reads are bounded.

use std::path::Path;

use crate::codec::{self, Format};
use crate::error::{Error, ErrorKind, Result};
use crate::model::{json::FORMAT, Model};

/// Largest model file read, in bytes: far above what `model::MAX_NODES`
/// nodes take as JSON, and a bound on memory all the same.
pub const MAX_MODEL_BYTES: u64 = 2 << 30;

/// Reads and validates the model file at `path`; errors name the file.
pub fn read_model(path: &Path) -> Result<Model> {
    let bytes = super::durable::read_bounded(path, MAX_MODEL_BYTES, &|| "a model file".into())
        .map_err(|(e, _)| e)?
        .bytes;
    model_from_bytes(&bytes).map_err(|e| e.with_path(path))
}

/// A model from a file's bytes, or an error that says what the bytes are
/// when they are plainly something else.
pub fn model_from_bytes(bytes: &[u8]) -> Result<Model> {
    if let Some(what) = what_else(bytes) {
        return Err(Error::new(ErrorKind::BadModel(format!(
            "this is {what}, not a model file (a model is JSON with \"format\": {FORMAT:?}, \
             as `burlwatch train --out` writes it)"
        ))));
    }
    let text = std::str::from_utf8(bytes).map_err(|_| {
        Error::new(ErrorKind::BadModel(
            "not a model file: it is not text (a model is JSON)".into(),
        ))
    })?;
    Model::from_json(text)
}

/// What a file that is not a model looks like, if it is recognisably
/// something else.
fn what_else(bytes: &[u8]) -> Option<&'static str> {
    match codec::sniff(bytes) {
        Ok(Format::PbmPlain | Format::PbmRaw) => return Some("a PBM image (a frame or a mask)"),
        Ok(Format::Png) => return Some("a PNG image (a frame)"),
        Err(_) => {}
    }
    if bytes.starts_with(crate::learn::store::MAGIC) {
        return Some("a label store");
    }
    let text = std::str::from_utf8(bytes).ok()?;
    let first = text
        .lines()
        .map(str::trim)
        .find(|l| !l.is_empty() && !l.starts_with('#'))?;
    // A detection log or `scan --json` output: one frame record a line.
    if let Ok(serde_json::Value::Object(o)) = serde_json::from_str(first) {
        if o.contains_key("frame") && o.contains_key("objects") {
            return Some("a detection log (frame records, one a line)");
        }
        return None;
    }
    let config_like = (first.starts_with('[') && first.ends_with(']') && !first.contains(','))
        || first
            .split_once('=')
            .is_some_and(|(k, _)| !k.trim().is_empty() && !k.contains('"') && !k.contains('{'));
    if config_like {
        return Some("a configuration-style text file (TOML or INI)");
    }
    (!first.starts_with('{')).then_some("text that is not JSON")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn message(bytes: &[u8]) -> String {
        model_from_bytes(bytes).unwrap_err().to_string()
    }

    #[test]
    fn wrong_files_are_named() {
        // The Netpbm magic numbers P1/P4 and the PNG signature (PNG
        // specification, 5.2) identify frames.
        assert!(message(b"P4\n2 2\n\x00\x00").contains("a PBM image"));
        assert!(message(b"P1\n1 1\n0\n").contains("a PBM image"));
        assert!(message(b"\x89PNG\r\n\x1a\n\0\0\0\rIHDR").contains("a PNG image"));
        assert!(message(b"BWSTORE\0\x02\0\0\0").contains("a label store"));
        let toml = message(b"# the box\n[folders]\ninbox = \"var/inbox\"\n");
        assert!(toml.contains("a configuration-style text file"), "{toml}");
        assert!(message(b"threshold = 0.5\n").contains("configuration-style"));
        assert!(message(b"[Unit]\nDescription=x\n").contains("configuration-style"));
        let log = message(
            b"{\"frame\":\"a.pbm\",\"objects\":[]}\n{\"frame\":\"b.pbm\",\"objects\":[]}\n",
        );
        assert!(log.contains("a detection log"), "{log}");
        assert!(message(b"# burlwatch\n\nSome words.\n").contains("text that is not JSON"));
        assert!(message(b"\xff\xfe\x00binary").contains("not text"));
        // Every message says what was expected.
        assert!(message(b"P4\n2 2\n\x00\x00").contains("burlwatch-model"));
        // JSON that is not a model keeps the model's own validation error.
        let json = message(b"{\"format\": \"something-else\"}");
        assert!(json.contains("expected \"burlwatch-model\""), "{json}");
    }
}
