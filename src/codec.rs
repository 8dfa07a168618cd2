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

/// Decodes a PBM or PNG file's bytes.
pub fn decode(bytes: &[u8], limits: &DecodeLimits) -> Result<BitFrame> {
    match sniff(bytes)? {
        Format::PbmPlain | Format::PbmRaw => decode_pbm(bytes, limits),
        Format::Png => decode_png(bytes, limits),
    }
}

fn check_size(width: u64, height: u64, limits: &DecodeLimits) -> Result<()> {
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
        h.pos += 1;
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
/// Non-interlaced PNGs (what cameras write) are decoded row by row, so
/// memory stays one row plus the packed frame whatever the colour type or
/// bit depth; interlaced ones need the whole picture and go through the
/// `image` crate. Luma follows the `image` crate's conversion (Rec. 709
/// weights 2126/7152/722 over 10000, 16-bit samples rounded to 8 bits), so
/// both paths agree. Alpha is composited over white: a transparent pixel
/// is background, never ink.
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
    if interlaced {
        return decode_png_whole(bytes, limits);
    }
    let (color, depth) = reader.output_color_type();
    let channels = color.samples();
    let wide = depth == png::BitDepth::Sixteen;
    let (width, height) = (w as usize, h as usize);
    let mut frame = BitFrame::new(width, height);
    let mut y = 0;
    while let Some(row) = reader.next_row().map_err(png_err)? {
        if y >= height {
            break;
        }
        let data = row.data();
        let out = frame.row_mut(y);
        for x in 0..width {
            let sample = |c: usize| -> u32 {
                let i = x * channels + c;
                if wide {
                    u16::from_be_bytes([data[2 * i], data[2 * i + 1]]) as u32
                } else {
                    data[i] as u32
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
                out[x / 64] |= 1 << (x % 64);
            }
        }
        y += 1;
    }
    if y < height {
        return Err(ErrorKind::Truncated {
            expected: height,
            found: y,
            unit: "rows",
        }
        .into());
    }
    Ok(frame)
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

/// Interlaced PNG: whole-picture decoding through the `image` crate.
fn decode_png_whole(bytes: &[u8], limits: &DecodeLimits) -> Result<BitFrame> {
    use image::ImageDecoder;
    let png_err = |e: image::ImageError| Error::new(ErrorKind::Png(e.to_string()));
    let decoder =
        image::codecs::png::PngDecoder::new(std::io::Cursor::new(bytes)).map_err(png_err)?;
    let (w, h) = decoder.dimensions();
    check_size(w as u64, h as u64, limits)?;
    let img = image::DynamicImage::from_decoder(decoder).map_err(png_err)?;
    let has_alpha = img.color().has_alpha();
    let la = img.to_luma_alpha8();
    let (width, height) = (w as usize, h as usize);
    let mut frame = BitFrame::new(width, height);
    let raw = la.as_raw();
    for y in 0..height {
        let row = frame.row_mut(y);
        for x in 0..width {
            let i = 2 * (y * width + x);
            let (l, a) = (raw[i] as u32, raw[i + 1] as u32);
            let luma = if has_alpha {
                (l * a + 255 * (255 - a) + 127) / 255
            } else {
                l
            };
            let dark = luma < limits.png_threshold as u32;
            if dark != limits.png_invert {
                row[x / 64] |= 1 << (x % 64);
            }
        }
    }
    Ok(frame)
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

/// Encodes a frame as an 8-bit grey PNG (set = black). PNG cannot hold an
/// empty picture, so a frame of width or height 0 is an error.
pub fn encode_png(frame: &BitFrame) -> Result<Vec<u8>> {
    if frame.is_empty() {
        return Err(Error::new(ErrorKind::Png(format!(
            "a {}x{} frame cannot be written as PNG",
            frame.width(),
            frame.height()
        ))));
    }
    let mut buf = Vec::new();
    let pixels: Vec<u8> = (0..frame.height())
        .flat_map(|y| (0..frame.width()).map(move |x| (x, y)))
        .map(|(x, y)| if frame.get(x, y) { 0 } else { 255 })
        .collect();
    let img = image::GrayImage::from_raw(frame.width() as u32, frame.height() as u32, pixels)
        .expect("buffer size matches");
    img.write_to(&mut std::io::Cursor::new(&mut buf), image::ImageFormat::Png)
        .map_err(|e| Error::new(ErrorKind::Png(e.to_string())))?;
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

    #[test]
    fn png_alpha_is_composited_over_white() {
        // Black pixels at alpha 255, 200, 100 and 0 (common practice: a
        // transparent pixel shows the background, here white paper).
        let img = image::RgbaImage::from_fn(4, 1, |x, _| {
            image::Rgba([0, 0, 0, [255u8, 200, 100, 0][x as usize]])
        });
        let mut png = Vec::new();
        image::DynamicImage::ImageRgba8(img)
            .write_to(&mut std::io::Cursor::new(&mut png), image::ImageFormat::Png)
            .unwrap();
        let f = decode(&png, &lim()).unwrap();
        // Over white: luma 0, 55, 155, 255; below 128 is ink.
        assert_eq!(f.to_ascii(), "##..\n");
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
