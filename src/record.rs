//! The JSON record of one scanned frame: what `scan --json` prints and the
//! line the daemon appends to the detection log (JSON Lines, one record per
//! frame).
//!
//! These serde structs are the log format, kept apart from the domain
//! types so the format changes only on purpose; this module knows nothing
//! of detection, which builds the records from its objects
//! (`FrameRecord::new`, `ObjectRecord::from_object` in [`crate::detect`]).
//! Fields:
//! - `time`: when the frame was processed, RFC 3339 in UTC (`...Z`);
//! - `frame`: the frame's file name; `sha256`: hex SHA-256 of its bytes;
//! - `width`, `height`: pixels;
//! - `model_version`: the registry version of the model that produced the
//!   record; `model_hash`: the first 12 hex digits of the SHA-256 of that
//!   model's file, so two models that both say "version 1" (trained on two
//!   boxes, or by hand) are told apart (empty in records written before
//!   models had one);
//! - `millis`: processing time (decode to objects), milliseconds;
//! - `objects`: id (1..n in raster order), `bbox` `[x0, y0, x1, y1]`
//!   inclusive, `centroid` `[x, y]`, `area` in pixels, mean `score`.

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

/// One object of a record.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ObjectRecord {
    pub id: u32,
    pub bbox: [u32; 4],
    pub centroid: [f64; 2],
    pub area: u64,
    pub score: f64,
}

/// One frame's record.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FrameRecord {
    pub time: String,
    pub frame: String,
    pub sha256: String,
    pub width: u32,
    pub height: u32,
    pub model_version: u64,
    #[serde(default)]
    pub model_hash: String,
    pub millis: f64,
    pub objects: Vec<ObjectRecord>,
}

/// Lower-case hex SHA-256 of some bytes (FIPS 180-4).
pub fn sha256_hex(bytes: &[u8]) -> String {
    let d = Sha256::digest(bytes);
    let mut s = String::with_capacity(64);
    for b in d {
        s.push_str(&format!("{b:02x}"));
    }
    s
}

/// RFC 3339 UTC time with milliseconds.
pub fn rfc3339(t: std::time::SystemTime) -> String {
    humantime::format_rfc3339_millis(t).to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sha256_of_abc() {
        // FIPS 180-4 / NIST example: SHA-256("abc").
        assert_eq!(
            sha256_hex(b"abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }

    #[test]
    fn time_is_rfc3339_utc() {
        let t = std::time::UNIX_EPOCH + std::time::Duration::from_millis(951_782_400_123);
        // 951782400 s after the epoch is 2000-02-29T00:00:00Z (leap day; common practice check).
        assert_eq!(rfc3339(t), "2000-02-29T00:00:00.123Z");
    }
}
