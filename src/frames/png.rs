//! PNG frames: one 8- or 16-bit greyscale image per file.
use super::PixelKind;
use crate::error::{Error, Result};
use png::{BitDepth, ColorType};
use std::fs::File;
use std::io::BufReader;
use std::path::Path;

pub(super) struct PngFrames {
    reader: png::Reader<BufReader<File>>,
    raw: Vec<u8>,
    pub width: usize,
    pub height: usize,
    pub kind: PixelKind,
}

impl PngFrames {
    pub fn open(path: &Path) -> Result<PngFrames> {
        let f = File::open(path).map_err(|e| Error::io(path, e))?;
        let reader = png::Decoder::new(BufReader::new(f))
            .read_info()
            .map_err(|e| Error::frame(path, Some(0), format!("not a readable PNG: {e}")))?;
        let info = reader.info();
        let kind = match (info.color_type, info.bit_depth) {
            (ColorType::Grayscale, BitDepth::Eight) => PixelKind::U8,
            (ColorType::Grayscale, BitDepth::Sixteen) => PixelKind::U16,
            (c, b) => {
                return Err(Error::frame(
                    path,
                    Some(0),
                    format!("PNG is {c:?} at {b:?} bits: use 8- or 16-bit greyscale"),
                ))
            }
        };
        let (width, height) = (info.width as usize, info.height as usize);
        Ok(PngFrames {
            reader,
            raw: Vec::new(),
            width,
            height,
            kind,
        })
    }

    pub fn read(&mut self, idx: usize, out: &mut [f32]) -> std::result::Result<bool, String> {
        if idx > 0 {
            return Ok(false);
        }
        let size = self
            .reader
            .output_buffer_size()
            .ok_or("PNG too large for memory")?;
        self.raw.resize(size, 0);
        self.reader
            .next_frame(&mut self.raw)
            .map_err(|e| format!("cannot decode PNG pixel data: {e}"))?;
        match self.kind {
            PixelKind::U8 => out
                .iter_mut()
                .zip(&self.raw)
                .for_each(|(o, &b)| *o = b as f32),
            _ => out
                .iter_mut()
                .zip(self.raw.chunks_exact(2))
                .for_each(|(o, b)| *o = u16::from_be_bytes([b[0], b[1]]) as f32),
        }
        Ok(true)
    }
}
