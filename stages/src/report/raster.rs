//! Maps of many records as an image: records binned into square cells of a few screen pixels,
//! each cell one pixel of an RGBA PNG (empty cells transparent), embedded in the SVG as a data
//! URI, so a field of a hundred thousand records costs tens of kilobytes instead of one SVG
//! element per record. The PNG is written here (PNG specification, W3C 2003: signature,
//! IHDR, IDAT holding the zlib-compressed rows each behind filter byte 0, IEND; every chunk
//! with its CRC-32), compressed with flate2.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::io::Write as _;

/// Screen pixels per cell side.
pub const CELL_PX: f64 = 2.0;

/// Records binned to cells of a `cols` x `rows` grid; a cell's pixel from its records.
pub struct Raster {
    pub cols: usize,
    pub rows: usize,
    /// Record indices per occupied cell (row, column), in record order.
    pub cells: BTreeMap<(usize, usize), Vec<usize>>,
}

impl Raster {
    /// Bins screen positions (x right, y down, from the image's top-left corner) of a
    /// `width` x `height` pixel image; positions outside it are left out.
    pub fn new(width: f64, height: f64, pos: &[(f64, f64)]) -> Raster {
        let cols = (width / CELL_PX).ceil().max(1.0) as usize;
        let rows = (height / CELL_PX).ceil().max(1.0) as usize;
        let mut cells: BTreeMap<(usize, usize), Vec<usize>> = BTreeMap::new();
        for (i, &(x, y)) in pos.iter().enumerate() {
            let (c, r) = ((x / CELL_PX).floor(), (y / CELL_PX).floor());
            if c >= 0.0 && r >= 0.0 && (c as usize) < cols && (r as usize) < rows {
                cells.entry((r as usize, c as usize)).or_default().push(i);
            }
        }
        Raster { cols, rows, cells }
    }

    /// The PNG of the cells coloured by `colour` (RGB of a cell's records; None leaves the
    /// cell transparent).
    pub fn png(&self, colour: &dyn Fn(&[usize]) -> Option<[u8; 3]>) -> Vec<u8> {
        let mut rgba = vec![0u8; self.cols * self.rows * 4];
        for (&(r, c), idx) in &self.cells {
            if let Some([red, g, b]) = colour(idx) {
                let k = (r * self.cols + c) * 4;
                rgba[k..k + 4].copy_from_slice(&[red, g, b, 255]);
            }
        }
        png_rgba(self.cols, self.rows, &rgba)
    }
}

/// An 8-bit RGBA PNG of `w` x `h` pixels (row major, 4 bytes a pixel).
pub fn png_rgba(w: usize, h: usize, rgba: &[u8]) -> Vec<u8> {
    let mut raw = Vec::with_capacity(h * (w * 4 + 1));
    for row in rgba.chunks_exact(w * 4) {
        raw.push(0);
        raw.extend_from_slice(row);
    }
    let mut z = flate2::write::ZlibEncoder::new(Vec::new(), flate2::Compression::default());
    z.write_all(&raw).expect("writing to memory");
    let idat = z.finish().expect("writing to memory");
    let mut ihdr = Vec::with_capacity(13);
    ihdr.extend_from_slice(&(w as u32).to_be_bytes());
    ihdr.extend_from_slice(&(h as u32).to_be_bytes());
    ihdr.extend_from_slice(&[8, 6, 0, 0, 0]);
    let mut out = vec![0x89, b'P', b'N', b'G', 0x0d, 0x0a, 0x1a, 0x0a];
    for (kind, data) in [
        (b"IHDR", &ihdr[..]),
        (b"IDAT", &idat[..]),
        (b"IEND", &[][..]),
    ] {
        out.extend_from_slice(&(data.len() as u32).to_be_bytes());
        let mut crc = flate2::Crc::new();
        crc.update(kind);
        crc.update(data);
        out.extend_from_slice(kind);
        out.extend_from_slice(data);
        out.extend_from_slice(&crc.sum().to_be_bytes());
    }
    out
}

/// Standard base64 (RFC 4648 section 4, with padding).
pub fn base64(data: &[u8]) -> String {
    const A: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
    let mut s = String::with_capacity(data.len().div_ceil(3) * 4);
    for ch in data.chunks(3) {
        let b = [ch[0], *ch.get(1).unwrap_or(&0), *ch.get(2).unwrap_or(&0)];
        let n = (u32::from(b[0]) << 16) | (u32::from(b[1]) << 8) | u32::from(b[2]);
        for k in 0..4 {
            if k <= ch.len() {
                s.push(A[(n >> (18 - 6 * k) & 63) as usize] as char);
            } else {
                s.push('=');
            }
        }
    }
    s
}

/// The SVG element drawing `png` over the rectangle at (x, y), `w` x `h` pixels.
pub fn svg_image(s: &mut String, png: &[u8], x: f64, y: f64, w: f64, h: f64) {
    let _ = write!(
        s,
        "<image x=\"{x:.1}\" y=\"{y:.1}\" width=\"{w:.1}\" height=\"{h:.1}\" preserveAspectRatio=\"none\" style=\"image-rendering:pixelated\" href=\"data:image/png;base64,{}\"/>",
        base64(png)
    );
}

/// "#rrggbb" to RGB.
pub fn rgb(hex: &str) -> [u8; 3] {
    let v = |i: usize| u8::from_str_radix(hex.get(i..i + 2).unwrap_or("99"), 16).unwrap_or(0x99);
    [v(1), v(3), v(5)]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn base64_of_the_rfc_examples() {
        // RFC 4648 section 10 test vectors.
        for (i, o) in [
            ("", ""),
            ("f", "Zg=="),
            ("fo", "Zm8="),
            ("foo", "Zm9v"),
            ("foob", "Zm9vYg=="),
            ("fooba", "Zm9vYmE="),
            ("foobar", "Zm9vYmFy"),
        ] {
            assert_eq!(base64(i.as_bytes()), o);
        }
    }

    #[test]
    fn png_chunks_and_pixels_read_back() {
        // A 3 x 2 image: the chunk layout and CRCs by the specification, and the pixels back
        // through zlib. The CRC of "IEND" with no data is the well-known AE 42 60 82.
        let rgba: Vec<u8> = (0..24).map(|i| i as u8 * 10).collect();
        let png = png_rgba(3, 2, &rgba);
        assert_eq!(&png[..8], &[0x89, b'P', b'N', b'G', 0x0d, 0x0a, 0x1a, 0x0a]);
        assert_eq!(&png[png.len() - 4..], &[0xae, 0x42, 0x60, 0x82]);
        assert_eq!(&png[12..16], b"IHDR");
        assert_eq!(&png[16..24], &[0, 0, 0, 3, 0, 0, 0, 2]);
        let idat_len = u32::from_be_bytes(png[33..37].try_into().unwrap()) as usize;
        assert_eq!(&png[37..41], b"IDAT");
        let mut d = flate2::read::ZlibDecoder::new(&png[41..41 + idat_len]);
        let mut raw = Vec::new();
        std::io::Read::read_to_end(&mut d, &mut raw).unwrap();
        assert_eq!(raw.len(), 2 * (1 + 12));
        assert_eq!(raw[0], 0);
        assert_eq!(&raw[1..13], &rgba[..12]);
        assert_eq!(&raw[14..26], &rgba[12..]);
    }

    #[test]
    fn records_fall_in_their_cells() {
        let r = Raster::new(
            10.0,
            6.0,
            &[(0.5, 0.5), (1.9, 1.9), (2.1, 0.0), (9.9, 5.9), (10.0, 1.0)],
        );
        assert_eq!((r.cols, r.rows), (5, 3));
        assert_eq!(r.cells[&(0, 0)], vec![0, 1]);
        assert_eq!(r.cells[&(0, 1)], vec![2]);
        assert_eq!(r.cells[&(2, 4)], vec![3]);
        assert_eq!(r.cells.len(), 3);
        assert_eq!(rgb("#1f9e89"), [0x1f, 0x9e, 0x89]);
    }
}
