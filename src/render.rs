//! Annotated pictures of a frame for people: the frame in light grey on
//! white, the detected pixels in blue, each object boxed in vermillion
//! with its id and score, at an integer zoom. Pure: a frame, a detection
//! mask and the objects in, RGB pixels (and PNG bytes) out.
//!
//! The colours are from the palette of Okabe and Ito ("Color Universal
//! Design", 2008), chosen to stay apart for the common forms of colour
//! blindness: blue (0, 114, 178) for detections, vermillion (213, 94, 0)
//! for boxes; ink is light grey so both stand out, and labels are black on
//! white. Text is drawn with a 3x5 pixel font of our own (digits and a
//! point), scaled with the picture.
//!
//! Invariants: the picture is exactly `zoom` times the frame in each
//! direction; a box is drawn one frame pixel outside its object, so it
//! never hides the object's own pixels; a label is kept inside the
//! picture.

use crate::error::{Error, Result};
use crate::frame::BitFrame;

/// Blank paper.
pub const WHITE: [u8; 3] = [255, 255, 255];
/// Set (ink) pixels of the frame.
pub const INK: [u8; 3] = [200, 200, 200];
/// Detected pixels (Okabe-Ito blue).
pub const DETECTED: [u8; 3] = [0, 114, 178];
/// Object boxes (Okabe-Ito vermillion).
pub const BOX: [u8; 3] = [213, 94, 0];
/// Label text.
pub const TEXT: [u8; 3] = [0, 0, 0];

/// One object to box: its inclusive box `[x0, y0, x1, y1]`, id and score.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Mark {
    pub bbox: [u32; 4],
    pub id: u32,
    pub score: f64,
}

impl Mark {
    /// The marks of a record's objects.
    pub fn of_record(record: &crate::record::FrameRecord) -> Vec<Mark> {
        record
            .objects
            .iter()
            .map(|o| Mark {
                bbox: o.bbox,
                id: o.id,
                score: o.score,
            })
            .collect()
    }
}

/// An RGB picture, row by row, 3 bytes a pixel.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Picture {
    pub width: usize,
    pub height: usize,
    pub rgb: Vec<u8>,
}

impl Picture {
    fn new(width: usize, height: usize) -> Picture {
        Picture {
            width,
            height,
            rgb: WHITE.repeat(width * height),
        }
    }

    /// The colour at `(x, y)`.
    pub fn at(&self, x: usize, y: usize) -> [u8; 3] {
        let i = (y * self.width + x) * 3;
        [self.rgb[i], self.rgb[i + 1], self.rgb[i + 2]]
    }

    fn put(&mut self, x: i64, y: i64, c: [u8; 3]) {
        if x >= 0 && y >= 0 && (x as usize) < self.width && (y as usize) < self.height {
            let i = (y as usize * self.width + x as usize) * 3;
            self.rgb[i..i + 3].copy_from_slice(&c);
        }
    }

    fn fill(&mut self, x0: i64, y0: i64, x1: i64, y1: i64, c: [u8; 3]) {
        for y in y0.max(0)..=y1.min(self.height as i64 - 1) {
            for x in x0.max(0)..=x1.min(self.width as i64 - 1) {
                self.put(x, y, c);
            }
        }
    }

    /// PNG bytes: indexed colour when the picture has at most 16 colours
    /// (as drawn here it has at most five: 4 bits a pixel, a sixth of
    /// 8-bit RGB before compression), 8-bit RGB otherwise.
    pub fn to_png(&self) -> Result<Vec<u8>> {
        let err = |e: png::EncodingError| Error::daemon(format!("cannot encode the picture: {e}"));
        let mut palette: Vec<[u8; 3]> = Vec::new();
        let mut indexed = true;
        for px in self.rgb.chunks_exact(3) {
            let c = [px[0], px[1], px[2]];
            if !palette.contains(&c) {
                if palette.len() == 16 {
                    indexed = false;
                    break;
                }
                palette.push(c);
            }
        }
        let mut out = Vec::new();
        let mut enc = png::Encoder::new(&mut out, self.width as u32, self.height as u32);
        let data = if indexed {
            let depth: usize = match palette.len() {
                0..=2 => 1,
                3..=4 => 2,
                _ => 4,
            };
            enc.set_color(png::ColorType::Indexed);
            enc.set_depth(match depth {
                1 => png::BitDepth::One,
                2 => png::BitDepth::Two,
                _ => png::BitDepth::Four,
            });
            enc.set_palette(palette.concat());
            let per_byte = 8 / depth;
            let row_bytes = self.width.div_ceil(per_byte);
            let mut data = vec![0u8; row_bytes * self.height];
            for y in 0..self.height {
                for x in 0..self.width {
                    let i = (y * self.width + x) * 3;
                    let c = [self.rgb[i], self.rgb[i + 1], self.rgb[i + 2]];
                    let k = palette
                        .iter()
                        .position(|p| *p == c)
                        .expect("in the palette") as u8;
                    let shift = 8 - depth * (x % per_byte + 1);
                    data[y * row_bytes + x / per_byte] |= k << shift;
                }
            }
            data
        } else {
            enc.set_color(png::ColorType::Rgb);
            enc.set_depth(png::BitDepth::Eight);
            self.rgb.clone()
        };
        enc.set_compression(png::Compression::High);
        let mut w = enc.write_header().map_err(err)?;
        w.write_image_data(&data).map_err(err)?;
        drop(w);
        Ok(out)
    }
}

/// The zoom that makes a frame about 512 pixels on its longer side, from
/// 1 (frames that large or larger) to 8.
pub fn zoom_for(width: usize, height: usize) -> usize {
    let side = width.max(height).max(1);
    (512 / side).clamp(1, 8)
}

/// The 3x5 font: each glyph five rows of three bits (high bit left).
fn glyph(c: char) -> Option<[u8; 5]> {
    Some(match c {
        '0' => [0b111, 0b101, 0b101, 0b101, 0b111],
        '1' => [0b010, 0b110, 0b010, 0b010, 0b111],
        '2' => [0b111, 0b001, 0b111, 0b100, 0b111],
        '3' => [0b111, 0b001, 0b111, 0b001, 0b111],
        '4' => [0b101, 0b101, 0b111, 0b001, 0b001],
        '5' => [0b111, 0b100, 0b111, 0b001, 0b111],
        '6' => [0b111, 0b100, 0b111, 0b101, 0b111],
        '7' => [0b111, 0b001, 0b001, 0b001, 0b001],
        '8' => [0b111, 0b101, 0b111, 0b101, 0b111],
        '9' => [0b111, 0b101, 0b111, 0b001, 0b111],
        '.' => [0b000, 0b000, 0b000, 0b000, 0b010],
        ' ' => [0; 5],
        _ => return None,
    })
}

/// Width in pixels of `text` at font `scale` (4 columns a glyph, gap
/// included, less the last gap).
fn text_width(text: &str, scale: i64) -> i64 {
    (text.chars().count() as i64 * 4 - 1).max(0) * scale
}

fn draw_text(p: &mut Picture, x: i64, y: i64, text: &str, scale: i64) {
    for (k, c) in text.chars().enumerate() {
        let Some(rows) = glyph(c) else { continue };
        let gx = x + k as i64 * 4 * scale;
        for (r, bits) in rows.iter().enumerate() {
            for col in 0..3 {
                if bits >> (2 - col) & 1 == 1 {
                    let (px, py) = (gx + col * scale, y + r as i64 * scale);
                    p.fill(px, py, px + scale - 1, py + scale - 1, TEXT);
                }
            }
        }
    }
}

/// Draws `frame` at `zoom`, `detected` pixels over it (same size as the
/// frame, or `None`), and a box and label for each mark.
pub fn render(
    frame: &BitFrame,
    detected: Option<&BitFrame>,
    marks: &[Mark],
    zoom: usize,
) -> Picture {
    let z = zoom.max(1);
    let (w, h) = (frame.width(), frame.height());
    let mut p = Picture::new(w * z, h * z);
    for y in 0..h {
        for x in 0..w {
            let c = if detected.is_some_and(|d| d.get(x, y)) {
                DETECTED
            } else if frame.get(x, y) {
                INK
            } else {
                continue;
            };
            let (px, py) = ((x * z) as i64, (y * z) as i64);
            p.fill(px, py, px + z as i64 - 1, py + z as i64 - 1, c);
        }
    }
    let z = z as i64;
    let line = (z / 2).max(2);
    let scale = (z / 2).max(2);
    for m in marks {
        // The frame pixels just outside the object, in picture pixels.
        let (x0, y0) = (m.bbox[0] as i64 * z - line, m.bbox[1] as i64 * z - line);
        let (x1, y1) = (
            (m.bbox[2] as i64 + 1) * z + line - 1,
            (m.bbox[3] as i64 + 1) * z + line - 1,
        );
        p.fill(x0, y0, x1, y0 + line - 1, BOX);
        p.fill(x0, y1 - line + 1, x1, y1, BOX);
        p.fill(x0, y0, x0 + line - 1, y1, BOX);
        p.fill(x1 - line + 1, y0, x1, y1, BOX);
        let text = format!("{} {:.2}", m.id, m.score);
        let (tw, th) = (text_width(&text, scale), 5 * scale);
        // Above the box if there is room, else below it; inside the picture.
        let ty = if y0 - th - 2 * scale >= 0 {
            y0 - th - scale
        } else {
            (y1 + scale + 1).min(p.height as i64 - th - 1)
        };
        let tx = x0.clamp(0, (p.width as i64 - tw - 2).max(0));
        p.fill(tx - 1, ty - 1, tx + tw, ty + th, WHITE);
        draw_text(&mut p, tx, ty, &text, scale);
    }
    p
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn zoom_keeps_small_frames_legible() {
        assert_eq!(zoom_for(64, 40), 8);
        assert_eq!(zoom_for(256, 256), 2);
        assert_eq!(zoom_for(512, 300), 1);
        assert_eq!(zoom_for(2048, 2048), 1);
    }

    #[test]
    fn pixels_boxes_and_labels_land_where_they_should() {
        let frame = BitFrame::from_fn(32, 20, |x, _| x % 4 == 0);
        let detected = BitFrame::from_fn(32, 20, |x, y| {
            (10..=13).contains(&x) && (8..=11).contains(&y)
        });
        let marks = [Mark {
            bbox: [10, 8, 13, 11],
            id: 1,
            score: 0.97,
        }];
        let p = render(&frame, Some(&detected), &marks, 4);
        assert_eq!((p.width, p.height), (128, 80));
        // Ink, paper, detection.
        assert_eq!(p.at(0, 0), INK);
        assert_eq!(p.at(5, 0), WHITE);
        assert_eq!(p.at(11 * 4 + 1, 9 * 4 + 1), DETECTED);
        // The box, two picture pixels thick, just outside the object.
        assert_eq!(p.at(10 * 4 - 1, 9 * 4), BOX);
        assert_eq!(p.at(14 * 4, 9 * 4), BOX);
        assert_eq!(p.at(11 * 4, 8 * 4 - 2), BOX);
        assert_eq!(p.at(10 * 4, 8 * 4), DETECTED);
        // A label above the box: black pixels somewhere in the band.
        let band = (8 * 4 - 2 - 12)..(8 * 4 - 2);
        assert!(band.clone().any(|y| (30..100).any(|x| p.at(x, y) == TEXT)));
        let png = p.to_png().unwrap();
        assert_eq!(&png[1..4], b"PNG");
    }
}
