//! Frame decoding and grouping against outside references: the example files
//! of the Netpbm PBM specification and of Wikipedia, the `image` crate's PNM
//! and PNG decoders, and `imageproc`'s connected-component labelling.

use std::io::Cursor;

use image::{
    DynamicImage, GrayImage, ImageBuffer, ImageFormat, Luma, Rgb, RgbImage, Rgba, RgbaImage,
};
use imageproc::region_labelling::{connected_components, Connectivity};

use burlwatch::codec::{self, DecodeLimits};
use burlwatch::detect::group::{self, BBox, GroupParams};
use burlwatch::frame::BitFrame;
use burlwatch::synth::Rng;
use burlwatch::ErrorKind;

fn lim() -> DecodeLimits {
    DecodeLimits::default()
}

fn decode(bytes: &[u8]) -> burlwatch::Result<BitFrame> {
    codec::decode(bytes, &lim())
}

// ---------------------------------------------------------------------------
// Bytes allocated by the current thread, to check that hostile headers are
// refused before any pixel buffer exists. The counter is per thread, so the
// other tests of this binary running at the same time do not disturb it.

pub(crate) mod counting {
    use std::alloc::{GlobalAlloc, Layout, System};
    use std::cell::Cell;

    pub struct Counting;

    thread_local! {
        static BYTES: Cell<u64> = const { Cell::new(0) };
        /// Bytes this thread holds (memory freed on another thread than
        /// the one that took it is counted where it is freed), and the
        /// most it held since `held_at_most` began.
        static LIVE: Cell<i64> = const { Cell::new(0) };
        static PEAK: Cell<i64> = const { Cell::new(0) };
    }

    fn add(n: usize) {
        let _ = BYTES.try_with(|b| b.set(b.get().wrapping_add(n as u64)));
    }

    fn hold(n: i64) {
        let _ = LIVE.try_with(|l| {
            let v = l.get() + n;
            l.set(v);
            let _ = PEAK.try_with(|p| p.set(p.get().max(v)));
        });
    }

    // SAFETY: every method hands the caller's arguments, unchanged, to the
    // system allocator, whose contract is the same as the trait's; the
    // counting touches only a thread-local integer and never allocates.
    unsafe impl GlobalAlloc for Counting {
        unsafe fn alloc(&self, l: Layout) -> *mut u8 {
            add(l.size());
            hold(l.size() as i64);
            // SAFETY: the caller keeps `GlobalAlloc`'s contract; passed on as is.
            unsafe { System.alloc(l) }
        }
        unsafe fn alloc_zeroed(&self, l: Layout) -> *mut u8 {
            add(l.size());
            hold(l.size() as i64);
            // SAFETY: the caller keeps `GlobalAlloc`'s contract; passed on as is.
            unsafe { System.alloc_zeroed(l) }
        }
        unsafe fn realloc(&self, p: *mut u8, l: Layout, new_size: usize) -> *mut u8 {
            add(new_size);
            hold(new_size as i64 - l.size() as i64);
            // SAFETY: the caller keeps `GlobalAlloc`'s contract; passed on as is.
            unsafe { System.realloc(p, l, new_size) }
        }
        unsafe fn dealloc(&self, p: *mut u8, l: Layout) {
            hold(-(l.size() as i64));
            // SAFETY: the caller keeps `GlobalAlloc`'s contract; passed on as is.
            unsafe { System.dealloc(p, l) }
        }
    }

    /// Runs `f` and returns its result with the most heap this thread held
    /// at once meanwhile, above what it held before.
    pub fn held_at_most<T>(f: impl FnOnce() -> T) -> (T, i64) {
        let before = LIVE.with(Cell::get);
        PEAK.with(|p| p.set(before));
        let r = f();
        (r, PEAK.with(Cell::get) - before)
    }

    /// Runs `f` and returns its result with the bytes this thread allocated.
    pub fn allocated_by<T>(f: impl FnOnce() -> T) -> (T, u64) {
        let before = BYTES.with(Cell::get);
        let r = f();
        (r, BYTES.with(Cell::get).wrapping_sub(before))
    }
}

#[global_allocator]
static ALLOCATOR: counting::Counting = counting::Counting;

// ---------------------------------------------------------------------------
// 1. The specification's and Wikipedia's example files.

/// feep.pbm as printed in the Netpbm PBM specification
/// (netpbm.sourceforge.net/doc/pbm.html), verbatim.
const FEEP: &str = "P1
# feep.pbm
24 7
0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0
0 1 1 1 1 0 0 1 1 1 1 0 0 1 1 1 1 0 0 1 1 1 1 0
0 1 0 0 0 0 0 1 0 0 0 0 0 1 0 0 0 0 0 1 0 0 1 0
0 1 1 1 0 0 0 1 1 1 0 0 0 1 1 1 0 0 0 1 1 1 1 0
0 1 0 0 0 0 0 1 0 0 0 0 0 1 0 0 0 0 0 1 0 0 0 0
0 1 0 0 0 0 0 1 1 1 1 0 0 1 1 1 1 0 0 1 0 0 0 0
0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0 0
";

/// 4x5 glyphs of the letters in feep.pbm, read off the example above.
fn glyph(letter: char) -> [&'static str; 5] {
    match letter {
        'F' => ["####", "#...", "###.", "#...", "#..."],
        'E' => ["####", "#...", "###.", "#...", "####"],
        'P' => ["####", "#..#", "####", "#...", "#..."],
        _ => unreachable!(),
    }
}

#[test]
fn feep_from_the_pbm_specification() {
    let f = decode(FEEP.as_bytes()).unwrap();
    assert_eq!((f.width(), f.height()), (24, 7));
    let ones = FEEP
        .lines()
        .skip(3)
        .flat_map(|l| l.split(' '))
        .filter(|t| *t == "1")
        .count();
    assert_eq!(ones, 48);
    assert_eq!(f.count_set(), 48);
    // Spot checks: corners clear, the F's top-left, the P's bowl.
    assert!(!f.get(0, 0) && !f.get(23, 0) && !f.get(0, 6) && !f.get(23, 6));
    assert!(f.get(1, 1) && f.get(4, 1) && !f.get(5, 1));
    assert!(f.get(22, 2) && !f.get(20, 2) && !f.get(22, 4));
    assert!(f.get(10, 5) && !f.get(4, 5), "E's foot, F has none");
    // It spells FEEP: glyphs at columns 1, 7, 13 and 19 of rows 1..=5.
    for (k, letter) in "FEEP".chars().enumerate() {
        let g = glyph(letter);
        for (dy, row) in g.iter().enumerate() {
            for (dx, c) in row.chars().enumerate() {
                let (x, y) = (1 + 6 * k + dx, 1 + dy);
                assert_eq!(f.get(x, y), c == '#', "{letter} at ({x},{y})");
            }
        }
    }
    let in_glyphs: usize = "FEEP"
        .chars()
        .map(|l| glyph(l).concat().matches('#').count())
        .sum();
    assert_eq!(in_glyphs, 48, "nothing outside the letters");

    // Raw PBM: rows of ceil(24/8) = 3 bytes, most significant bit leftmost
    // (Netpbm PBM specification). Row 1 is 0111 1001 1110 0111 1001 1110.
    let raw = codec::encode_pbm(&f);
    assert!(raw.starts_with(b"P4\n24 7\n"));
    let body = &raw[b"P4\n24 7\n".len()..];
    assert_eq!(body.len(), 21);
    assert_eq!(&body[3..6], &[0x79, 0xE7, 0x9E]);
    assert_eq!(&body[0..3], &[0, 0, 0]);
    assert_eq!(decode(&raw).unwrap(), f);
    // And the `image` crate reads both files the same way.
    assert_eq!(image_crate_decode(FEEP.as_bytes()).unwrap(), f);
    assert_eq!(image_crate_decode(&raw).unwrap(), f);
}

#[test]
fn letter_j_from_wikipedia() {
    // Wikipedia, "Netpbm" article, the PBM example bitmap of the letter J.
    let spaced = "P1
# This is an example bitmap of the letter \"J\"
6 10
0 0 0 0 1 0
0 0 0 0 1 0
0 0 0 0 1 0
0 0 0 0 1 0
0 0 0 0 1 0
0 0 0 0 1 0
1 0 0 0 1 0
0 1 1 1 0 0
0 0 0 0 0 0
0 0 0 0 0 0
";
    let f = decode(spaced.as_bytes()).unwrap();
    assert_eq!((f.width(), f.height()), (6, 10));
    assert_eq!(f.count_set(), 11);
    assert_eq!(
        f.to_ascii(),
        "....#.\n....#.\n....#.\n....#.\n....#.\n....#.\n#...#.\n.###..\n......\n......\n"
    );
    // The same picture with no whitespace between the bits, as the article
    // also shows it (the PBM specification lets plain-format bits run
    // together).
    let packed = spaced.replace("0 ", "0").replace("1 ", "1");
    assert!(packed.contains("\n000010\n"));
    assert_eq!(decode(packed.as_bytes()).unwrap(), f);
    assert_eq!(image_crate_decode(packed.as_bytes()).unwrap(), f);
}

// ---------------------------------------------------------------------------
// 2. The same pixels as the `image` crate's PNM decoder.

/// Decodes with the `image` crate: a PBM "1" (black) becomes luma 0, a "0"
/// luma 255; set = black.
fn image_crate_decode(bytes: &[u8]) -> image::ImageResult<BitFrame> {
    let dec = image::codecs::pnm::PnmDecoder::new(Cursor::new(bytes))?;
    let luma = DynamicImage::from_decoder(dec)?.to_luma8();
    assert!(luma.pixels().all(|p| p.0[0] == 0 || p.0[0] == 255));
    Ok(BitFrame::from_fn(
        luma.width() as usize,
        luma.height() as usize,
        |x, y| luma.get_pixel(x as u32, y as u32).0[0] == 0,
    ))
}

/// Header variants: comments, blanks, TABs and CRs between the tokens, one
/// whitespace character after the height (Netpbm PBM specification).
fn header(magic: &str, w: usize, h: usize, style: usize) -> String {
    match style % 4 {
        0 => format!("{magic}\n{w} {h}\n"),
        1 => format!("{magic}\n# loom camera 3, shift B\n{w} {h}\n"),
        2 => format!("{magic} {w}\t{h}\r"),
        _ => format!("{magic}\n#a\n  #b\n\t{w}\r\n# between\n{h}\n"),
    }
}

/// Plain PBM with varied raster whitespace (none, blanks, TABs, CR LF).
fn write_p1(f: &BitFrame, style: usize) -> Vec<u8> {
    let mut s = header("P1", f.width(), f.height(), style);
    let mut n = 0usize;
    for y in 0..f.height() {
        for x in 0..f.width() {
            s.push(if f.get(x, y) { '1' } else { '0' });
            n += 1;
            match style % 3 {
                0 => s.push(' '),
                1 => {}
                _ => s.push_str(if n.is_multiple_of(7) { "\r\n" } else { "\t" }),
            }
        }
        if style % 3 != 1 {
            s.push('\n');
        }
    }
    s.into_bytes()
}

/// Raw PBM, rows padded to whole bytes with random padding bits (the
/// specification calls them "don't care", from memory).
fn write_p4(f: &BitFrame, style: usize, rng: &mut Rng) -> Vec<u8> {
    let mut out = header("P4", f.width(), f.height(), style).into_bytes();
    for y in 0..f.height() {
        for bx in 0..f.width().div_ceil(8) {
            let mut byte = 0u8;
            for k in 0..8 {
                let x = bx * 8 + k;
                let on = if x < f.width() {
                    f.get(x, y)
                } else {
                    rng.chance(0.5)
                };
                if on {
                    byte |= 0x80 >> k;
                }
            }
            out.push(byte);
        }
    }
    out
}

fn random_frame(rng: &mut Rng, w: usize, h: usize, density: f64) -> BitFrame {
    BitFrame::from_fn(w, h, |_, _| rng.chance(density))
}

#[test]
fn pbm_pixels_match_the_image_crate() {
    let mut rng = Rng::new(0x5eed_f00d);
    let mut files = 0;
    for w in [1, 7, 8, 9, 63, 64, 65, 130] {
        for h in 1..=5 {
            let density = [0.0, 0.1, 0.5, 0.9, 1.0][h - 1];
            let f = random_frame(&mut rng, w, h, density);
            let style = w + h;
            for bytes in [write_p1(&f, style), write_p4(&f, style, &mut rng)] {
                let ours = decode(&bytes).unwrap_or_else(|e| panic!("{w}x{h} style {style}: {e}"));
                let theirs = image_crate_decode(&bytes).unwrap();
                assert_eq!((ours.width(), ours.height()), (w, h));
                for y in 0..h {
                    for x in 0..w {
                        assert_eq!(
                            ours.get(x, y),
                            theirs.get(x, y),
                            "{w}x{h} style {style} at ({x},{y})"
                        );
                    }
                }
                assert_eq!(ours, f);
                files += 1;
            }
        }
    }
    assert_eq!(files, 80);
}

#[test]
fn our_encoders_are_read_by_the_image_crate() {
    let mut rng = Rng::new(99);
    for w in [1, 8, 65, 130] {
        let f = random_frame(&mut rng, w, 3, 0.4);
        assert_eq!(
            image_crate_decode(&codec::encode_pbm(&f)).unwrap(),
            f,
            "P4 {w}"
        );
        assert_eq!(
            image_crate_decode(&codec::encode_pbm_plain(&f)).unwrap(),
            f,
            "P1 {w}"
        );
        // Our PNG writer: black = set, read back by the image crate.
        let png =
            image::load_from_memory_with_format(&codec::encode_png(&f).unwrap(), ImageFormat::Png)
                .unwrap()
                .to_luma8();
        let back = BitFrame::from_fn(w, 3, |x, y| png.get_pixel(x as u32, y as u32).0[0] == 0);
        assert_eq!(back, f, "PNG {w}");
    }
}

// ---------------------------------------------------------------------------
// 3. Bad input.

/// The error of a file that must not decode; its message is never empty.
fn err(bytes: &[u8]) -> burlwatch::Error {
    match decode(bytes) {
        Ok(f) => panic!("{:?} decoded to {f:?}", String::from_utf8_lossy(bytes)),
        Err(e) => {
            assert!(!e.to_string().is_empty());
            e
        }
    }
}

#[test]
fn bad_input_gives_the_right_error() {
    for junk in [
        &b""[..],
        b"hello, loom",
        b"GIF89a\x01\x00",
        b"P",
        b"p1\n1 1\n1",
        b"P7\n1 1\n",
    ] {
        assert!(
            matches!(err(junk).kind(), ErrorKind::BadMagic { .. }),
            "{junk:?}"
        );
    }
    // Header problems: missing, negative or non-numeric sizes, magic glued
    // to the width.
    for bad in [
        &b"P1"[..],
        b"P4\n",
        b"P1\n3\n",
        b"P1\n3 # only a width\n",
        b"P1\n-3 2\n",
        b"P4\n3 -2\n",
        b"P1\nx 1\n",
        b"P1\n3 +2\n",
        b"P13 2\n",
        b"P4\n8 2x",
    ] {
        assert!(
            matches!(err(bad).kind(), ErrorKind::BadHeader { .. }),
            "{:?}",
            String::from_utf8_lossy(bad)
        );
    }
    match err(b"P1\n-3 2\n").kind() {
        ErrorKind::BadHeader { offset, .. } => assert_eq!(*offset, 3),
        k => panic!("{k:?}"),
    }
    // Truncated rasters.
    match err(b"P4\n16 16\n\x00\x00").kind() {
        ErrorKind::Truncated {
            expected,
            found,
            unit,
        } => {
            assert_eq!((*expected, *found, *unit), (32, 2, "bytes"))
        }
        k => panic!("{k:?}"),
    }
    match err(b"P4\n8 2").kind() {
        ErrorKind::Truncated {
            expected, found, ..
        } => assert_eq!((*expected, *found), (2, 0)),
        k => panic!("{k:?}"),
    }
    match err(b"P1\n3 3\n1 0 1 0").kind() {
        ErrorKind::Truncated {
            expected,
            found,
            unit,
        } => {
            assert_eq!((*expected, *found, *unit), (9, 4, "pixels"))
        }
        k => panic!("{k:?}"),
    }
    // A P1 raster holds only 0, 1 and whitespace.
    match err(b"P1\n2 1\n1 2").kind() {
        ErrorKind::BadPixelValue { offset, found } => assert_eq!((*offset, *found), (9, '2')),
        k => panic!("{k:?}"),
    }
    assert!(matches!(
        err(b"P1\n2 1\n1x").kind(),
        ErrorKind::BadPixelValue { found: 'x', .. }
    ));
    // PNG signature (PNG specification, section 5.2) followed by junk.
    let mut png = b"\x89PNG\r\n\x1a\n".to_vec();
    png.extend_from_slice(b"this is not a chunk");
    assert!(matches!(err(&png).kind(), ErrorKind::Png(_)));
    assert!(matches!(
        err(b"\x89PNG\r\n\x1a\n").kind(),
        ErrorKind::Png(_)
    ));
}

#[test]
fn oversized_headers_are_refused_before_allocating() {
    for (bytes, w, h) in [
        (&b"P4\n100000 100000\n"[..], 100_000u64, 100_000u64),
        (b"P1\n8193 1\n", 8193, 1),
        (b"P4\n1 8193\n", 1, 8193),
        (b"P4\n99999999999999999999999999 1\n", u64::MAX, 1),
    ] {
        let (r, bytes_allocated) = counting::allocated_by(|| decode(bytes));
        match r.as_ref().map_err(|e| e.kind()) {
            Err(ErrorKind::TooLarge {
                width,
                height,
                max_width,
                max_height,
            }) => {
                assert_eq!((*width, *height), (w, h));
                assert_eq!((*max_width, *max_height), (8192, 8192));
            }
            other => panic!("{:?}: {other:?}", String::from_utf8_lossy(bytes)),
        }
        // A frame of 100000 x 100000 pixels would need 1.25 GB; the error
        // path allocates at most a few small values.
        assert!(bytes_allocated < 4096, "{bytes_allocated} bytes allocated");
        drop(r);
    }
    // Limits are configurable; exactly at the limit is accepted.
    let tight = DecodeLimits {
        max_width: 8,
        max_height: 2,
        ..lim()
    };
    assert!(codec::decode(b"P4\n8 2\n\xff\x00", &tight).is_ok());
    assert!(matches!(
        codec::decode(b"P4\n9 2\n\xff\x00\xff\x00", &tight)
            .unwrap_err()
            .kind(),
        ErrorKind::TooLarge { .. }
    ));
    // A PNG over the limit is refused from its header too.
    let wide = GrayImage::from_pixel(8193, 1, Luma([255]));
    let png = png_bytes(&DynamicImage::ImageLuma8(wide));
    assert!(matches!(
        decode(&png).unwrap_err().kind(),
        ErrorKind::TooLarge { width: 8193, .. }
    ));
}

#[test]
fn damaged_files_never_panic() {
    let mut rng = Rng::new(4242);
    let f = random_frame(&mut rng, 37, 5, 0.5);
    let p4 = codec::encode_pbm(&f);
    let p1 = write_p1(&f, 3);
    let png = codec::encode_png(&f).unwrap();
    let mut decoded = 0;
    for file in [&p4, &p1, &png] {
        // Every prefix: never a panic, and never a wrong frame from a short
        // PBM file (a prefix that still decodes must be the whole picture).
        for n in 0..=file.len() {
            if let Ok(g) = decode(&file[..n]) {
                decoded += 1;
                if file != &png {
                    assert_eq!(g, f, "prefix of {n} bytes");
                }
            }
        }
        // Byte flips, one to three per variant.
        for _ in 0..300 {
            let mut d = file.clone();
            for _ in 0..rng.range(1, 4) {
                let i = rng.range(0, d.len());
                d[i] ^= 1 << rng.range(0, 8);
            }
            let _ = decode(&d);
        }
    }
    assert!(decoded >= 3, "the whole files decode");
}

// ---------------------------------------------------------------------------
// 4. PNG.

fn png_bytes(img: &DynamicImage) -> Vec<u8> {
    let mut buf = Vec::new();
    img.write_to(&mut Cursor::new(&mut buf), ImageFormat::Png)
        .unwrap();
    buf
}

#[test]
fn grey_png_is_thresholded_dark_as_set() {
    // 16 x 16 ramp: value = x + 16 y covers 0..=255 once.
    let img = GrayImage::from_fn(16, 16, |x, y| Luma([(x + 16 * y) as u8]));
    let png = png_bytes(&DynamicImage::ImageLuma8(img));
    let f = decode(&png).unwrap();
    assert_eq!((f.width(), f.height()), (16, 16));
    // Below 128 is ink: the top half.
    let dark = BitFrame::from_fn(16, 16, |x, y| x + 16 * y < 128);
    assert_eq!(f, dark);
    assert!(f.get(15, 7) && !f.get(0, 8), "127 is set, 128 is not");
    let inverted = DecodeLimits {
        png_invert: true,
        ..lim()
    };
    assert_eq!(codec::decode(&png, &inverted).unwrap(), dark.not());
    let t200 = DecodeLimits {
        png_threshold: 200,
        ..lim()
    };
    assert_eq!(
        codec::decode(&png, &t200).unwrap(),
        BitFrame::from_fn(16, 16, |x, y| x + 16 * y < 200)
    );
    let t0 = DecodeLimits {
        png_threshold: 0,
        ..lim()
    };
    assert_eq!(codec::decode(&png, &t0).unwrap().count_set(), 0);
    // 16-bit grey: the same picture at the other bit depth.
    let deep: ImageBuffer<Luma<u16>, Vec<u16>> = ImageBuffer::from_fn(4, 2, |x, y| {
        Luma([if (x + y) % 2 == 0 { 0x2000 } else { 0xE000 }])
    });
    let f = decode(&png_bytes(&DynamicImage::ImageLuma16(deep))).unwrap();
    assert_eq!(f, BitFrame::from_fn(4, 2, |x, y| (x + y) % 2 == 0));
}

#[test]
fn colour_png_goes_through_luma() {
    // image 0.25 converts colour to luma with the Rec. 709 weights
    // (src/color.rs, SRGB_LUMA = [2126, 7152, 722] / 10000): red 54, green
    // 182, blue 18, so red and blue are dark, green is light.
    let colours = [
        ([0u8, 0, 0], true),
        ([255, 255, 255], false),
        ([255, 0, 0], true),
        ([0, 255, 0], false),
        ([0, 0, 255], true),
        ([120, 120, 120], true),
        ([140, 140, 140], false),
    ];
    let rgb = RgbImage::from_fn(colours.len() as u32, 2, |x, _| Rgb(colours[x as usize].0));
    let want = BitFrame::from_fn(colours.len(), 2, |x, _| colours[x].1);
    let png = png_bytes(&DynamicImage::ImageRgb8(rgb));
    assert_eq!(decode(&png).unwrap(), want);
    let inverted = DecodeLimits {
        png_invert: true,
        ..lim()
    };
    assert_eq!(codec::decode(&png, &inverted).unwrap(), want.not());
    // RGBA, fully opaque: the same pixels.
    let rgba = RgbaImage::from_fn(colours.len() as u32, 2, |x, _| {
        let [r, g, b] = colours[x as usize].0;
        Rgba([r, g, b, 255])
    });
    let png = png_bytes(&DynamicImage::ImageRgba8(rgba));
    assert_eq!(decode(&png).unwrap(), want);
    assert_eq!(codec::decode(&png, &inverted).unwrap(), want.not());
}

/// Adler-32 of `data` as RFC 1950 defines it: two running sums modulo
/// 65521, the second summing the first.
fn adler32(data: &[u8]) -> u32 {
    let (mut a, mut b) = (1u32, 0u32);
    for &d in data {
        a = (a + d as u32) % 65521;
        b = (b + a) % 65521;
    }
    (b << 16) | a
}

/// A zlib stream (RFC 1950) of stored, uncompressed deflate blocks (RFC
/// 1951, section 3.2.4).
fn zlib_stored(data: &[u8]) -> Vec<u8> {
    let mut out = vec![0x78, 0x01];
    let blocks: Vec<&[u8]> = data.chunks(65535).collect();
    for (k, block) in blocks.iter().enumerate() {
        out.push((k + 1 == blocks.len()) as u8);
        let len = block.len() as u16;
        out.extend(len.to_le_bytes());
        out.extend((!len).to_le_bytes());
        out.extend_from_slice(block);
    }
    out.extend(adler32(data).to_be_bytes());
    out
}

/// How a hand-made PNG stores its pixels.
struct PngLayout {
    /// IHDR colour type: 0 grey, 2 RGB, 3 palette, 4 grey + alpha, 6 RGBA.
    color_type: u8,
    bit_depth: u8,
    /// Samples per pixel (1 for palette indices).
    channels: usize,
    /// Extra chunks between IHDR and IDAT (PLTE, tRNS).
    chunks: Vec<([u8; 4], Vec<u8>)>,
}

/// A PNG file written by hand from the PNG specification (second edition,
/// W3C Recommendation of 10 November 2003,
/// <https://www.w3.org/TR/2003/REC-PNG-20031110/>): IHDR, the layout's extra chunks,
/// one IDAT, IEND, each with its CRC-32. Every stored row has filter type
/// 0 and packs its samples most significant bit first (section 7.2). With
/// `interlaced`, the rows are the seven Adam7 passes of section 8.2, each
/// a reduced picture; a pass with no pixel stores no row. `sample(x, y, c)`
/// gives channel `c` of pixel `(x, y)`.
fn handmade_png(
    w: usize,
    h: usize,
    layout: &PngLayout,
    interlaced: bool,
    sample: &dyn Fn(usize, usize, usize) -> u16,
) -> Vec<u8> {
    // Starting row, starting column, row step, column step of each pass.
    let passes: &[(usize, usize, usize, usize)] = if interlaced {
        &[
            (0, 0, 8, 8),
            (0, 4, 8, 8),
            (4, 0, 8, 4),
            (0, 2, 4, 4),
            (2, 0, 4, 2),
            (0, 1, 2, 2),
            (1, 0, 2, 1),
        ]
    } else {
        &[(0, 0, 1, 1)]
    };
    let depth = layout.bit_depth as usize;
    let mut raw = Vec::new();
    for &(y0, x0, dy, dx) in passes {
        let xs: Vec<usize> = (x0..w).step_by(dx).collect();
        if xs.is_empty() {
            continue;
        }
        for y in (y0..h).step_by(dy) {
            raw.push(0); // filter type None
            let mut bits: Vec<bool> = Vec::new();
            for &x in &xs {
                for c in 0..layout.channels {
                    let v = sample(x, y, c);
                    bits.extend((0..depth).rev().map(|b| (v >> b) & 1 == 1));
                }
            }
            for byte in bits.chunks(8) {
                raw.push(
                    byte.iter()
                        .enumerate()
                        .fold(0u8, |acc, (i, &b)| acc | (u8::from(b) << (7 - i))),
                );
            }
        }
    }
    let mut ihdr = Vec::new();
    ihdr.extend((w as u32).to_be_bytes());
    ihdr.extend((h as u32).to_be_bytes());
    ihdr.extend([
        layout.bit_depth,
        layout.color_type,
        0,
        0,
        u8::from(interlaced),
    ]);
    let mut out = b"\x89PNG\r\n\x1a\n".to_vec();
    let mut chunk = |kind: &[u8; 4], data: &[u8]| {
        out.extend((data.len() as u32).to_be_bytes());
        let start = out.len();
        out.extend_from_slice(kind);
        out.extend_from_slice(data);
        let crc = crc32fast::hash(&out[start..]);
        out.extend(crc.to_be_bytes());
    };
    chunk(b"IHDR", &ihdr);
    for (kind, data) in &layout.chunks {
        chunk(kind, data);
    }
    chunk(b"IDAT", &zlib_stored(&raw));
    chunk(b"IEND", &[]);
    out
}

/// What the `image` crate makes of a PNG: its 8-bit luma and alpha, alpha
/// composited over white, darker than 128 set.
fn image_crate_png(bytes: &[u8]) -> BitFrame {
    let img = image::load_from_memory_with_format(bytes, ImageFormat::Png).unwrap();
    let la = img.to_luma_alpha8();
    BitFrame::from_fn(la.width() as usize, la.height() as usize, |x, y| {
        let [l, a] = la.get_pixel(x as u32, y as u32).0.map(u32::from);
        (l * a + 255 * (255 - a) + 127) / 255 < 128
    })
}

#[test]
fn interlaced_png_matches_the_plain_one_and_the_image_crate() {
    let mut rng = Rng::new(0xada7);
    // A palette of four entries: black, white, dark red, and black made
    // half transparent by tRNS (luma 0 at alpha 128 over white: 127, ink).
    let palette = PngLayout {
        color_type: 3,
        bit_depth: 2,
        channels: 1,
        chunks: vec![
            (*b"PLTE", vec![0, 0, 0, 255, 255, 255, 120, 0, 0, 0, 0, 0]),
            (*b"tRNS", vec![255, 255, 255, 128]),
        ],
    };
    let layouts = [
        (
            PngLayout {
                color_type: 0,
                bit_depth: 1,
                channels: 1,
                chunks: vec![],
            },
            1u16,
        ),
        (
            PngLayout {
                color_type: 0,
                bit_depth: 4,
                channels: 1,
                chunks: vec![],
            },
            15,
        ),
        (
            PngLayout {
                color_type: 0,
                bit_depth: 8,
                channels: 1,
                chunks: vec![],
            },
            255,
        ),
        (
            PngLayout {
                color_type: 0,
                bit_depth: 16,
                channels: 1,
                chunks: vec![],
            },
            65535,
        ),
        (
            PngLayout {
                color_type: 2,
                bit_depth: 8,
                channels: 3,
                chunks: vec![],
            },
            255,
        ),
        (
            PngLayout {
                color_type: 4,
                bit_depth: 8,
                channels: 2,
                chunks: vec![],
            },
            255,
        ),
        (
            PngLayout {
                color_type: 6,
                bit_depth: 16,
                channels: 4,
                chunks: vec![],
            },
            65535,
        ),
        (palette, 3),
    ];
    for (layout, max) in &layouts {
        for (w, h) in [(1, 1), (3, 2), (9, 17), (33, 12)] {
            let values: Vec<u16> = (0..w * h * layout.channels)
                .map(|_| rng.range(0, *max as usize + 1) as u16)
                .collect();
            let sample = |x: usize, y: usize, c: usize| values[(y * w + x) * layout.channels + c];
            let plain = handmade_png(w, h, layout, false, &sample);
            let adam7 = handmade_png(w, h, layout, true, &sample);
            let what = format!(
                "colour type {} depth {} {w}x{h}",
                layout.color_type, layout.bit_depth
            );
            let want = image_crate_png(&plain);
            assert_eq!(image_crate_png(&adam7), want, "image crate, {what}");
            assert_eq!(decode(&plain).unwrap(), want, "plain, {what}");
            assert_eq!(decode(&adam7).unwrap(), want, "interlaced, {what}");
        }
    }
    // A cut interlaced file is an error, never a short or wrong frame; a
    // cut past the last pixel row may still give the whole picture.
    let layout = &layouts[2].0;
    let adam7 = handmade_png(16, 16, layout, true, &|x, y, _| (x * 16 + y) as u16);
    let whole = decode(&adam7).unwrap();
    let mut refused = 0;
    for n in 0..adam7.len() {
        match decode(&adam7[..n]) {
            Ok(f) => assert_eq!(f, whole, "{n} bytes"),
            Err(_) => refused += 1,
        }
    }
    assert!(refused > adam7.len() / 2, "{refused} cuts refused");
}

// ---------------------------------------------------------------------------
// 5. Connected components against imageproc.

fn to_gray(mask: &BitFrame) -> GrayImage {
    GrayImage::from_fn(mask.width() as u32, mask.height() as u32, |x, y| {
        Luma([if mask.get(x as usize, y as usize) {
            255
        } else {
            0
        }])
    })
}

#[test]
fn components_match_imageproc_label_for_label() {
    let mut rng = Rng::new(0xC0FFEE);
    let mut checked = 0;
    // No 1x1 masks: imageproc 0.27.0 panics on a 1x1 image whose pixel is
    // foreground (its union-find has width * height slots but labels start
    // at 1: assertion `i < self.count` in union_find.rs, observed here).
    // Ours is checked on 1x1 below.
    for (w, h) in [
        (2usize, 1usize),
        (1, 40),
        (63, 9),
        (64, 17),
        (65, 12),
        (200, 23),
        (130, 1),
    ] {
        for density in [0.0, 0.05, 0.3, 0.5, 0.7, 1.0] {
            let mask = random_frame(&mut rng, w, h, density);
            let theirs = connected_components(&to_gray(&mask), Connectivity::Eight, Luma([0u8]));
            let (runs, comp, n) = group::label(&mask, 0);
            // Our labels painted back into an image.
            let mut ours = vec![0u32; w * h];
            let mut covered = 0u64;
            let mut prev: Option<(u32, u32)> = None;
            for (r, &c) in runs.iter().zip(&comp) {
                assert!(r.x0 <= r.x1 && (r.x1 as usize) < w);
                assert!(prev.is_none_or(|p| p < (r.y, r.x0)), "runs in raster order");
                prev = Some((r.y, r.x0));
                for x in r.x0..=r.x1 {
                    ours[r.y as usize * w + x as usize] = c + 1;
                    covered += 1;
                }
            }
            assert_eq!(
                covered,
                mask.count_set(),
                "runs cover exactly the set pixels"
            );
            let mut max_label = 0;
            for y in 0..h {
                for x in 0..w {
                    let t = theirs.get_pixel(x as u32, y as u32).0[0];
                    max_label = max_label.max(t);
                    assert_eq!(ours[y * w + x], t, "{w}x{h} density {density} at ({x},{y})");
                }
            }
            assert_eq!(n as u32, max_label, "component count");
            // Objects: id, area, bounding box and centroid from imageproc's labels.
            let objects = group::group(
                &mask,
                GroupParams {
                    min_area: 1,
                    merge_distance: 0,
                },
                |_, _| 1.0,
            );
            assert_eq!(objects.len(), n);
            for o in &objects {
                let pixels: Vec<(u32, u32)> = theirs
                    .enumerate_pixels()
                    .filter(|p| p.2 .0[0] == o.id)
                    .map(|p| (p.0, p.1))
                    .collect();
                assert_eq!(o.area, pixels.len() as u64, "area of {}", o.id);
                let bbox = BBox {
                    x0: pixels.iter().map(|p| p.0).min().unwrap(),
                    y0: pixels.iter().map(|p| p.1).min().unwrap(),
                    x1: pixels.iter().map(|p| p.0).max().unwrap(),
                    y1: pixels.iter().map(|p| p.1).max().unwrap(),
                };
                assert_eq!(o.bbox, bbox, "bbox of {}", o.id);
                let sx: u64 = pixels.iter().map(|p| p.0 as u64).sum();
                let sy: u64 = pixels.iter().map(|p| p.1 as u64).sum();
                let a = pixels.len() as f64;
                assert_eq!(o.centroid, (sx as f64 / a, sy as f64 / a));
                assert_eq!(o.score, 1.0);
            }
            checked += 1;
        }
    }
    assert_eq!(checked, 42);
    for on in [false, true] {
        let one = BitFrame::from_fn(1, 1, |_, _| on);
        let (runs, comp, n) = group::label(&one, 0);
        let k = usize::from(on);
        assert_eq!((runs.len(), comp.len(), n), (k, k, k));
    }
}

#[test]
fn four_connectivity_would_differ_on_diagonals() {
    // A diagonal line is one 8-connected component (ours, imageproc's
    // Eight) but separate pixels for 4-connectivity: the grouping really is
    // 8-connected, not just agreeing on easy masks.
    let mask = BitFrame::from_ascii("#...\n.#..\n..#.\n...#\n");
    let eight = connected_components(&to_gray(&mask), Connectivity::Eight, Luma([0u8]));
    let four = connected_components(&to_gray(&mask), Connectivity::Four, Luma([0u8]));
    assert_eq!(eight.pixels().map(|p| p.0[0]).max(), Some(1));
    assert_eq!(four.pixels().map(|p| p.0[0]).max(), Some(4));
    assert_eq!(group::label(&mask, 0).2, 1);
}

// ---------------------------------------------------------------------------
// 6. Merge distance.

#[test]
fn merge_distance_is_chebyshev() {
    // Components merge when some pixels of each are within Chebyshev
    // distance merge_distance + 1 (common practice for grid gaps: a gap of
    // k clear pixels in any of the 8 directions). A at (0,0), B at (3,3):
    // Chebyshev 3, Manhattan 6, Euclidean 4.2. C at (7,0): 7 from A, 4 from B.
    let mask = BitFrame::from_ascii(
        "#......#\n\
         ........\n\
         ........\n\
         ...#....\n",
    );
    let count = |md: u32| {
        group::group(
            &mask,
            GroupParams {
                min_area: 1,
                merge_distance: md,
            },
            |_, _| 1.0,
        )
        .len()
    };
    assert_eq!(count(0), 3);
    assert_eq!(count(1), 3, "A-B gap is 2 clear pixels diagonally");
    assert_eq!(count(2), 2, "A and B merge at Chebyshev 3");
    assert_eq!(count(3), 1, "B and C at Chebyshev 4");
    let merged = group::group(
        &mask,
        GroupParams {
            min_area: 1,
            merge_distance: 2,
        },
        |_, _| 1.0,
    );
    assert_eq!(
        merged[0].bbox,
        BBox {
            x0: 0,
            y0: 0,
            x1: 3,
            y1: 3
        }
    );
    assert_eq!(merged[0].area, 2);
    assert_eq!((merged[1].id, merged[1].area), (2, 1));
    // min_area drops the lone pixel and renumbers the rest.
    let big = group::group(
        &mask,
        GroupParams {
            min_area: 2,
            merge_distance: 2,
        },
        |_, _| 1.0,
    );
    assert_eq!(big.len(), 1);
    assert_eq!(big[0].id, 1);
    // A horizontal gap: pixels 0 and 4 of a row (3 clear between).
    let row = BitFrame::from_ascii("#...#\n");
    let n = |md: u32| group::label(&row, md).2;
    assert_eq!((n(2), n(3)), (2, 1));
}

#[test]
fn run_grouping_matches_the_flood_fill_reference() {
    let mut rng = Rng::new(77);
    let mask = random_frame(&mut rng, 97, 41, 0.08);
    for (md, min_area) in [(0, 1), (3, 2), (9, 5)] {
        let p = GroupParams {
            min_area,
            merge_distance: md,
        };
        let fast = group::group(&mask, p, |_, _| 1.0);
        let slow = group::group_reference(&mask, p);
        assert_eq!(fast, slow, "merge_distance {md}, min_area {min_area}");
        assert!(!fast.is_empty());
    }
}
