//! Decoding and encoding frames: PBM (P1 plain, P4 raw) and PNG.
//!
//! Pure functions from bytes to [`BitFrame`] and back; no file access. The
//! PBM reader follows the Netpbm PBM specification: the magic number, then
//! width and height as ASCII decimals separated by whitespace, with `#`
//! comments running to the end of a line allowed anywhere in the header;
//! one whitespace character after the height; then the raster. In P1 the
//! raster is `0`/`1` characters, whitespace between them optional; in P4 it
//! is 8 pixels a byte, most significant bit first, each row padded to a
//! whole byte. A 1 is black, which burlwatch reads as set ("ink").
//!
//! Design decision: sizes are checked against [`DecodeLimits`] *before* any
//! pixel buffer is allocated, so a hostile header cannot make the box
//! allocate gigabytes. PNG (any colour type and bit depth) is decoded row
//! by row, converted to 8-bit luma (alpha composited over white) and
//! thresholded: darker than the threshold is set, unless `invert` is on.

use crate::error::{Error, ErrorKind, Result};
use crate::frame::BitFrame;

/// Limits and PNG options for decoding.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct DecodeLimits {
    /// Largest accepted width in pixels.
    pub max_width: usize,
    /// Largest accepted height in pixels.
    pub max_height: usize,
    /// PNG: a pixel whose 8-bit luma is below this is set (dark = ink).
    pub png_threshold: u8,
    /// PNG: set the light pixels instead of the dark ones.
    pub png_invert: bool,
}

impl Default for DecodeLimits {
    fn default() -> Self {
        DecodeLimits {
            max_width: 8192,
            max_height: 8192,
            png_threshold: 128,
            png_invert: false,
        }
    }
}

/// The on-disk formats burlwatch reads.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    PbmPlain,
    PbmRaw,
    Png,
}

const PNG_MAGIC: &[u8] = b"\x89PNG\r\n\x1a\n";

/// Recognises the format from the first bytes.
pub fn sniff(bytes: &[u8]) -> Result<Format> {
    if bytes.starts_with(b"P1") {
        Ok(Format::PbmPlain)
    } else if bytes.starts_with(b"P4") {
        Ok(Format::PbmRaw)
    } else if bytes.starts_with(PNG_MAGIC) {
        Ok(Format::Png)
    } else {
        let head: String = bytes
            .iter()
            .take(8)
            .map(|&b| {
                if b.is_ascii_graphic() || b == b' ' {
                    b as char
                } else {
                    '.'
                }
            })
            .collect();
        Err(ErrorKind::BadMagic { found: head }.into())
    }
}

/// The width and height a PBM or PNG file's header states, read without
/// decoding anything (for planning memory before the decode, which checks
/// the header again). `None` for bytes that are neither.
pub fn stated_size(bytes: &[u8]) -> Option<(u64, u64)> {
    match sniff(bytes).ok()? {
        Format::PbmPlain | Format::PbmRaw => {
            let mut h = Header { bytes, pos: 2 };
            Some((h.number("width").ok()?, h.number("height").ok()?))
        }
        // The IHDR chunk comes first: length, type, then width and height
        // as 4-byte big-endian numbers (PNG specification, 11.2.2).
        Format::Png => {
            let be = |at: usize| -> Option<u64> {
                Some(u32::from_be_bytes(bytes.get(at..at + 4)?.try_into().ok()?) as u64)
            };
            (bytes.get(12..16) == Some(b"IHDR")).then_some(())?;
            Some((be(16)?, be(20)?))
        }
    }
}

/// Decodes a PBM or PNG file's bytes.
pub fn decode(bytes: &[u8], limits: &DecodeLimits) -> Result<BitFrame> {
    match sniff(bytes)? {
        Format::PbmPlain | Format::PbmRaw => decode_pbm(bytes, limits),
        Format::Png => decode_png(bytes, limits),
    }
}

fn check_size(width: u64, height: u64, limits: &DecodeLimits) -> Result<()> {
    // A frame with no pixels was never inspected: it must not be logged as
    // a frame with no objects.
    if width == 0 || height == 0 {
        return Err(ErrorKind::Data(format!(
            "the frame is {width}x{height}: it has no pixels, so there is nothing to inspect"
        ))
        .into());
    }
    if width > limits.max_width as u64 || height > limits.max_height as u64 {
        return Err(ErrorKind::TooLarge {
            width,
            height,
            max_width: limits.max_width,
            max_height: limits.max_height,
        }
        .into());
    }
    Ok(())
}

/// Header reader: whitespace and `#` comments between tokens.
struct Header<'a> {
    bytes: &'a [u8],
    pos: usize,
}

impl Header<'_> {
    fn skip_space_and_comments(&mut self) {
        while self.pos < self.bytes.len() {
            let b = self.bytes[self.pos];
            if b == b'#' {
                while self.pos < self.bytes.len()
                    && self.bytes[self.pos] != b'\n'
                    && self.bytes[self.pos] != b'\r'
                {
                    self.pos += 1;
                }
            } else if is_pbm_space(b) {
                self.pos += 1;
            } else {
                break;
            }
        }
    }

    /// Reads an unsigned decimal; fails past `u32::MAX` digits' worth.
    fn number(&mut self, what: &str) -> Result<u64> {
        self.skip_space_and_comments();
        let start = self.pos;
        let mut value: u64 = 0;
        while self.pos < self.bytes.len() && self.bytes[self.pos].is_ascii_digit() {
            value = value
                .saturating_mul(10)
                .saturating_add((self.bytes[self.pos] - b'0') as u64);
            self.pos += 1;
        }
        if self.pos == start {
            return Err(if self.pos >= self.bytes.len() {
                Error::header(start, format!("file ends before the {what}"))
            } else {
                Error::header(
                    start,
                    format!(
                        "expected the {what} as a decimal number, found {:?}",
                        self.bytes[self.pos] as char
                    ),
                )
            });
        }
        Ok(value)
    }
}

/// Whitespace as the Netpbm specification defines it (blanks, TABs, CRs,
/// LFs, and also vertical tab and form feed, as C's `isspace`).
fn is_pbm_space(b: u8) -> bool {
    matches!(b, b' ' | b'\t' | b'\n' | b'\r' | 0x0b | 0x0c)
}

/// Decodes PBM, plain (P1) or raw (P4).
pub fn decode_pbm(bytes: &[u8], limits: &DecodeLimits) -> Result<BitFrame> {
    let plain = match sniff(bytes)? {
        Format::PbmPlain => true,
        Format::PbmRaw => false,
        Format::Png => return Err(Error::header(0, "PNG data where PBM was expected")),
    };
    let mut h = Header { bytes, pos: 2 };
    // The magic must be followed by whitespace or a comment.
    if let Some(&b) = bytes.get(2) {
        if !is_pbm_space(b) && b != b'#' {
            return Err(Error::header(2, "magic number not followed by whitespace"));
        }
    }
    let width = h.number("width")?;
    let height = h.number("height")?;
    check_size(width, height, limits)?;
    let (width, height) = (width as usize, height as usize);
    // Comments may stand between the height and the one whitespace
    // character that ends the header; a comment runs through its newline,
    // so that newline does not count as the delimiter (Netpbm PBM spec).
    while bytes.get(h.pos) == Some(&b'#') {
        while h.pos < bytes.len() && bytes[h.pos] != b'\n' && bytes[h.pos] != b'\r' {
            h.pos += 1;
        }
        // Past its newline, if it has one: a comment may run to the end of
        // the file (found by fuzzing: the raster then began past the end).
        h.pos = (h.pos + 1).min(bytes.len());
    }
    // Exactly one whitespace character ends the header.
    match bytes.get(h.pos) {
        Some(&b) if is_pbm_space(b) => h.pos += 1,
        Some(&b) => {
            return Err(Error::header(
                h.pos,
                format!(
                    "expected whitespace after the height, found {:?}",
                    b as char
                ),
            ))
        }
        None if plain || width == 0 || height == 0 => {}
        None => {
            return Err(ErrorKind::Truncated {
                expected: width.div_ceil(8) * height,
                found: 0,
                unit: "bytes",
            }
            .into())
        }
    }
    let raster = &bytes[h.pos..];
    if plain {
        decode_p1_raster(raster, h.pos, width, height)
    } else {
        decode_p4_raster(raster, width, height)
    }
}

fn decode_p1_raster(raster: &[u8], base: usize, width: usize, height: usize) -> Result<BitFrame> {
    let total = width * height;
    // Every pixel takes at least one byte: a raster shorter than that is
    // truncated, and is refused before the frame is allocated.
    if raster.len() < total {
        let found = raster.iter().filter(|b| matches!(b, b'0' | b'1')).count();
        return Err(ErrorKind::Truncated {
            expected: total,
            found,
            unit: "pixels",
        }
        .into());
    }
    let mut frame = BitFrame::new(width, height);
    let mut n = 0usize;
    let mut i = 0usize;
    while n < total {
        let Some(&b) = raster.get(i) else {
            return Err(ErrorKind::Truncated {
                expected: total,
                found: n,
                unit: "pixels",
            }
            .into());
        };
        match b {
            b'0' | b'1' => {
                if b == b'1' {
                    frame.set(n % width, n / width, true);
                }
                n += 1;
            }
            b'#' => {
                // Comments are not allowed in the raster by the spec, but
                // many writers emit them; skip to end of line.
                while i < raster.len() && raster[i] != b'\n' {
                    i += 1;
                }
                continue;
            }
            b if is_pbm_space(b) => {}
            other => {
                return Err(ErrorKind::BadPixelValue {
                    offset: base + i,
                    found: other as char,
                }
                .into())
            }
        }
        i += 1;
    }
    Ok(frame)
}

fn decode_p4_raster(raster: &[u8], width: usize, height: usize) -> Result<BitFrame> {
    let row_bytes = width.div_ceil(8);
    let need = row_bytes * height;
    if raster.len() < need {
        return Err(ErrorKind::Truncated {
            expected: need,
            found: raster.len(),
            unit: "bytes",
        }
        .into());
    }
    let mut frame = BitFrame::new(width, height);
    for y in 0..height {
        let src = &raster[y * row_bytes..(y + 1) * row_bytes];
        let row = frame.row_mut(y);
        for (i, &byte) in src.iter().enumerate() {
            // PBM: most significant bit is the leftmost pixel; ours is LSB-first.
            let b = byte.reverse_bits() as u64;
            row[i / 8] |= b << ((i % 8) * 8);
        }
    }
    frame.clear_padding();
    Ok(frame)
}

/// Decodes a PNG of any colour type and bit depth, thresholding its luma.
///
/// The picture is decoded row by row and each row's pixels go straight
/// into the packed frame, so memory stays one row plus the frame whatever
/// the colour type, bit depth or interlacing. Luma follows the `image`
/// crate's conversion (Rec. 709 weights 2126/7152/722 over 10000, 16-bit
/// samples rounded to 8 bits), which tests/reference_images.rs checks.
/// Alpha is composited over white: a transparent pixel is background,
/// never ink.
pub fn decode_png(bytes: &[u8], limits: &DecodeLimits) -> Result<BitFrame> {
    let png_err = |e: png::DecodingError| Error::new(ErrorKind::Png(e.to_string()));
    let mut decoder = png::Decoder::new(std::io::Cursor::new(bytes));
    decoder.set_transformations(png::Transformations::EXPAND);
    let mut reader = decoder.read_info().map_err(png_err)?;
    let (w, h, interlaced) = {
        let info = reader.info();
        (info.width, info.height, info.interlaced)
    };
    check_size(w as u64, h as u64, limits)?;
    let (color, depth) = reader.output_color_type();
    let channels = color.samples();
    let wide = depth == png::BitDepth::Sixteen;
    let (width, height) = (w as usize, h as usize);
    let lines = PassLine::all(width, height, interlaced);
    let mut frame = BitFrame::new(width, height);
    let mut done = 0;
    while let Some(row) = reader.next_row().map_err(png_err)? {
        let Some(line) = lines.get(done) else { break };
        let data = row.data();
        let need = line.samples * channels * if wide { 2 } else { 1 };
        if data.len() < need {
            return Err(Error::new(ErrorKind::Png(format!(
                "row {done} holds {} bytes, {need} expected",
                data.len()
            ))));
        }
        let out = frame.row_mut(line.y);
        for i in 0..line.samples {
            let sample = |c: usize| -> u32 {
                let k = i * channels + c;
                if wide {
                    u16::from_be_bytes([data[2 * k], data[2 * k + 1]]) as u32
                } else {
                    data[k] as u32
                }
            };
            let (luma, alpha) = match channels {
                1 => (sample(0), None),
                2 => (sample(0), Some(sample(1))),
                3 => (rec709(sample(0), sample(1), sample(2)), None),
                _ => (rec709(sample(0), sample(1), sample(2)), Some(sample(3))),
            };
            let (luma, alpha) = if wide {
                (to_8_bits(luma), alpha.map(to_8_bits))
            } else {
                (luma, alpha)
            };
            let luma = match alpha {
                // Over white: l * a + 255 * (1 - a), rounded.
                Some(a) => (luma * a + 255 * (255 - a) + 127) / 255,
                None => luma,
            };
            let dark = luma < limits.png_threshold as u32;
            if dark != limits.png_invert {
                let x = line.x0 + i * line.step;
                out[x / 64] |= 1 << (x % 64);
            }
        }
        done += 1;
    }
    if done < lines.len() {
        return Err(ErrorKind::Truncated {
            expected: lines.len(),
            found: done,
            unit: "rows",
        }
        .into());
    }
    Ok(frame)
}

/// Where the pixels of one stored PNG row go: row `y` of the picture,
/// columns `x0`, `x0 + step`, ... (`samples` of them).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
struct PassLine {
    y: usize,
    x0: usize,
    step: usize,
    samples: usize,
}

impl PassLine {
    /// The stored rows of a `width` x `height` picture in file order. A
    /// plain PNG stores the picture's rows top to bottom. An interlaced one
    /// stores the seven passes of Adam7 one after the other, each a reduced
    /// picture of every `step`-th pixel of every `row_step`-th row; a pass
    /// with no pixel stores no row (PNG specification, second edition, W3C
    /// Recommendation of 10 November 2003, section 8.2, "Interlace
    /// methods", <https://www.w3.org/TR/2003/REC-PNG-20031110/>).
    fn all(width: usize, height: usize, interlaced: bool) -> Vec<PassLine> {
        if !interlaced {
            return (0..height)
                .map(|y| PassLine {
                    y,
                    x0: 0,
                    step: 1,
                    samples: width,
                })
                .collect();
        }
        // Per pass: starting row, starting column, row step, column step.
        const ADAM7: [(usize, usize, usize, usize); 7] = [
            (0, 0, 8, 8),
            (0, 4, 8, 8),
            (4, 0, 8, 4),
            (0, 2, 4, 4),
            (2, 0, 4, 2),
            (0, 1, 2, 2),
            (1, 0, 2, 1),
        ];
        let mut lines = Vec::new();
        for (y0, x0, row_step, step) in ADAM7 {
            let samples = width.saturating_sub(x0).div_ceil(step);
            if samples == 0 {
                continue;
            }
            lines.extend((y0..height).step_by(row_step).map(|y| PassLine {
                y,
                x0,
                step,
                samples,
            }));
        }
        lines
    }
}

/// Luma of an RGB sample as the `image` crate computes it.
fn rec709(r: u32, g: u32, b: u32) -> u32 {
    (2126 * r + 7152 * g + 722 * b) / 10000
}

/// A 16-bit sample rounded to 8 bits as the `image` crate does:
/// `round(c * 255 / 65535)`.
fn to_8_bits(c: u32) -> u32 {
    (c + 128) / 257
}

/// Encodes raw PBM (P4).
pub fn encode_pbm(frame: &BitFrame) -> Vec<u8> {
    let header = format!("P4\n{} {}\n", frame.width(), frame.height());
    let row_bytes = frame.width().div_ceil(8);
    let mut out = Vec::with_capacity(header.len() + row_bytes * frame.height());
    out.extend_from_slice(header.as_bytes());
    for y in 0..frame.height() {
        let row = frame.row(y);
        for i in 0..row_bytes {
            let byte = (row[i / 8] >> ((i % 8) * 8)) as u8;
            out.push(byte.reverse_bits());
        }
    }
    out
}

/// Encodes plain PBM (P1), 35 pixels a line (the spec asks for lines of at
/// most 70 characters).
pub fn encode_pbm_plain(frame: &BitFrame) -> Vec<u8> {
    let mut s = format!("P1\n{} {}\n", frame.width(), frame.height());
    for y in 0..frame.height() {
        for x in 0..frame.width() {
            s.push(if frame.get(x, y) { '1' } else { '0' });
            let last = x + 1 == frame.width();
            s.push(if last || (x + 1) % 35 == 0 { '\n' } else { ' ' });
        }
    }
    s.into_bytes()
}

/// Encodes a frame as an 8-bit grey PNG (set = black), fast compression
/// with an adaptive filter per row. PNG cannot hold an empty picture, so a
/// frame of width or height 0 is an error.
pub fn encode_png(frame: &BitFrame) -> Result<Vec<u8>> {
    let png_err = |e: png::EncodingError| Error::new(ErrorKind::Png(e.to_string()));
    let size = |n: usize| u32::try_from(n).ok().filter(|&n| n > 0);
    let (Some(width), Some(height)) = (size(frame.width()), size(frame.height())) else {
        return Err(Error::new(ErrorKind::Png(format!(
            "a {}x{} frame cannot be written as PNG",
            frame.width(),
            frame.height()
        ))));
    };
    let pixels: Vec<u8> = (0..frame.height())
        .flat_map(|y| (0..frame.width()).map(move |x| (x, y)))
        .map(|(x, y)| if frame.get(x, y) { 0 } else { 255 })
        .collect();
    let mut buf = Vec::new();
    let mut encoder = png::Encoder::new(&mut buf, width, height);
    encoder.set_color(png::ColorType::Grayscale);
    encoder.set_depth(png::BitDepth::Eight);
    encoder.set_compression(png::Compression::Fast);
    encoder.set_filter(png::Filter::Adaptive);
    let mut writer = encoder.write_header().map_err(png_err)?;
    writer.write_image_data(&pixels).map_err(png_err)?;
    writer.finish().map_err(png_err)?;
    Ok(buf)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn lim() -> DecodeLimits {
        DecodeLimits::default()
    }

    #[test]
    fn p4_roundtrip_odd_widths() {
        for w in [1, 7, 8, 9, 63, 64, 65, 130] {
            let f = BitFrame::from_fn(w, 3, |x, y| (x * 7 + y * 3) % 5 == 0);
            let bytes = encode_pbm(&f);
            assert_eq!(decode(&bytes, &lim()).unwrap(), f, "width {w}");
            let plain = encode_pbm_plain(&f);
            assert_eq!(decode(&plain, &lim()).unwrap(), f, "plain width {w}");
        }
    }

    #[test]
    fn the_stated_size_is_read_from_the_header_alone() {
        // Netpbm PBM: comments may stand between the header's numbers.
        assert_eq!(
            stated_size(b"P1\n# a comment\n3 # width\n\t2\n"),
            Some((3, 2))
        );
        // A header stating more than the limits is still read (the decode
        // refuses it); the raster need not be there.
        assert_eq!(stated_size(b"P4 100000 7\n"), Some((100_000, 7)));
        // PNG: width and height from IHDR (PNG specification, 11.2.2).
        let f = BitFrame::from_fn(37, 5, |x, _| x % 2 == 0);
        assert_eq!(stated_size(&encode_png(&f).unwrap()), Some((37, 5)));
        assert_eq!(stated_size(b"\x89PNG\r\n\x1a\n"), None);
        assert_eq!(stated_size(b"GIF89a"), None);
        assert_eq!(stated_size(b"P4\n"), None);
    }

    #[test]
    fn header_comments_and_whitespace() {
        let f = decode(b"P1\n# a comment\n3 # width\n\t2\n1 0 1\n010", &lim()).unwrap();
        assert_eq!(f.to_ascii(), "#.#\n.#.\n");
        // A comment right after the height, then the delimiter (Netpbm PBM
        // specification: the comment's own newline is not the delimiter).
        let c = decode(b"P4\n8 2# comment\n\n\xff\x01", &lim()).unwrap();
        assert_eq!(c.to_ascii(), "########\n.......#\n");
        // No whitespace between plain bits is allowed by the spec.
        let g = decode(b"P1 3 2 101010", &lim()).unwrap();
        assert_eq!(g, f);
    }

    /// Regression, found by `tests/fuzz.rs`: a comment after the height
    /// that runs to the end of the file panicked.
    #[test]
    fn a_comment_to_the_end_of_the_file_is_a_truncated_frame() {
        for bytes in [&b"P1\n1 1# a lo"[..], b"P4\n8 1#", b"P1 2 2 #\n"] {
            let e = decode(bytes, &lim()).unwrap_err().to_string();
            assert!(e.contains("truncated") || e.contains("expected"), "{e}");
        }
    }

    /// Regression: `P4 0 0` was logged as an inspected frame with no
    /// objects.
    #[test]
    fn a_frame_with_no_pixels_is_refused() {
        for bytes in [&b"P4\n0 0\n"[..], b"P1\n0 5\n", b"P4\n7 0\n"] {
            let e = decode(bytes, &lim()).unwrap_err().to_string();
            assert!(e.contains("no pixels"), "{e}");
        }
    }

    #[test]
    fn errors_are_typed() {
        assert!(matches!(
            decode(b"GIF89a", &lim()).unwrap_err().kind(),
            ErrorKind::BadMagic { .. }
        ));
        assert!(matches!(
            decode(b"P4\n16 16\n\x00\x00", &lim()).unwrap_err().kind(),
            ErrorKind::Truncated { .. }
        ));
        assert!(matches!(
            decode(b"P4\n99999 99999\n", &lim()).unwrap_err().kind(),
            ErrorKind::TooLarge { .. }
        ));
        assert!(matches!(
            decode(b"P1\n2 1\n1 2", &lim()).unwrap_err().kind(),
            ErrorKind::BadPixelValue { found: '2', .. }
        ));
        assert!(matches!(
            decode(b"P1\nx 1\n", &lim()).unwrap_err().kind(),
            ErrorKind::BadHeader { .. }
        ));
        assert!(matches!(
            decode(b"P4\n99999999999999999999999 1\n", &lim())
                .unwrap_err()
                .kind(),
            ErrorKind::TooLarge { .. }
        ));
    }

    /// A PNG of `width` x 1 pixels in `color` at 8 bits, from its samples.
    fn png_of(color: png::ColorType, width: u32, samples: &[u8]) -> Vec<u8> {
        let mut buf = Vec::new();
        let mut e = png::Encoder::new(&mut buf, width, 1);
        e.set_color(color);
        e.set_depth(png::BitDepth::Eight);
        let mut w = e.write_header().unwrap();
        w.write_image_data(samples).unwrap();
        w.finish().unwrap();
        buf
    }

    #[test]
    fn png_alpha_is_composited_over_white() {
        // Black pixels at alpha 255, 200, 100 and 0 (common practice: a
        // transparent pixel shows the background, here white paper).
        let rgba: Vec<u8> = [255u8, 200, 100, 0]
            .iter()
            .flat_map(|&a| [0, 0, 0, a])
            .collect();
        let f = decode(&png_of(png::ColorType::Rgba, 4, &rgba), &lim()).unwrap();
        // Over white: luma 0, 55, 155, 255; below 128 is ink.
        assert_eq!(f.to_ascii(), "##..\n");
        let grey_alpha = [0u8, 255, 0, 200, 0, 100, 0, 0];
        let f = decode(
            &png_of(png::ColorType::GrayscaleAlpha, 4, &grey_alpha),
            &lim(),
        )
        .unwrap();
        assert_eq!(f.to_ascii(), "##..\n");
    }

    #[test]
    fn adam7_places_every_pixel_once() {
        for (w, h) in [(1, 1), (3, 2), (5, 5), (8, 8), (9, 17), (13, 3)] {
            let mut seen = vec![0u8; w * h];
            for l in PassLine::all(w, h, true) {
                assert!(l.samples > 0 && l.y < h);
                for i in 0..l.samples {
                    seen[l.y * w + l.x0 + i * l.step] += 1;
                }
            }
            assert!(seen.iter().all(|&n| n == 1), "{w}x{h}: {seen:?}");
        }
        // The first rows of an 8x8 picture: pass 1 row 0 (one pixel), pass
        // 2 row 0 (one pixel, column 4), pass 3 row 4 (two pixels).
        let l = PassLine::all(8, 8, true);
        assert_eq!(
            &l[..3],
            &[
                PassLine {
                    y: 0,
                    x0: 0,
                    step: 8,
                    samples: 1
                },
                PassLine {
                    y: 0,
                    x0: 4,
                    step: 8,
                    samples: 1
                },
                PassLine {
                    y: 4,
                    x0: 0,
                    step: 4,
                    samples: 2
                },
            ]
        );
        assert_eq!(l.len(), 1 + 1 + 1 + 2 + 2 + 4 + 4);
    }

    #[test]
    fn png_threshold_and_invert() {
        let f = BitFrame::from_fn(5, 4, |x, y| x == y);
        let png = encode_png(&f).unwrap();
        assert!(encode_png(&BitFrame::new(0, 3)).is_err());
        assert_eq!(decode(&png, &lim()).unwrap(), f);
        let inv = DecodeLimits {
            png_invert: true,
            ..lim()
        };
        assert_eq!(decode(&png, &inv).unwrap(), f.not());
    }
}
