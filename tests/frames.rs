//! Frame input: every format round-trips, streaming frame by frame, bad input is named.
//! (File-format tests: common practice, no source; the TIFF layout written by hand follows
//! the TIFF 6.0 specification, from memory.)
use modegram::frames::{
    mean_frame, npy_header, write_tiff_f32, write_tiff_u16, FrameReader, FrameStack, PixelKind,
};
use std::io::Write;
use std::path::{Path, PathBuf};

fn pattern(w: usize, h: usize, k: usize, max: f64) -> Vec<f64> {
    (0..w * h)
        .map(|i| ((i * 37 + k * 1001) % 251) as f64 / 250.0 * max)
        .collect()
}

fn read_all(path: &Path) -> (Vec<Vec<f32>>, FrameReader) {
    let mut r = FrameReader::open(path).unwrap();
    let mut out = Vec::new();
    let mut buf = vec![0f32; r.width() * r.height()];
    while r.read_next(&mut buf).unwrap() {
        out.push(buf.clone());
    }
    (out, r)
}

#[test]
fn tiff_u16_multi_page_round_trip() {
    let d = tempfile::tempdir().unwrap();
    let p = d.path().join("s.tif");
    let frames: Vec<Vec<u16>> = (0..3)
        .map(|k| {
            pattern(33, 17, k, 65535.0)
                .iter()
                .map(|&v| v as u16)
                .collect()
        })
        .collect();
    let refs: Vec<&[u16]> = frames.iter().map(Vec::as_slice).collect();
    write_tiff_u16(&p, 33, 17, &refs).unwrap();
    let r = FrameReader::open(&p).unwrap();
    assert_eq!((r.width(), r.height(), r.len()), (33, 17, Some(3)));
    assert_eq!(r.kind(), PixelKind::U16);
    let (got, _) = read_all(&p);
    assert_eq!(got.len(), 3);
    for (g, f) in got.iter().zip(&frames) {
        assert!(g.iter().zip(f).all(|(&a, &b)| a == b as f32));
    }
}

#[test]
fn tiff_f32_round_trip() {
    let d = tempfile::tempdir().unwrap();
    let p = d.path().join("f.tiff");
    let frames: Vec<Vec<f32>> = (0..2)
        .map(|k| {
            pattern(20, 10, k, 1.5)
                .iter()
                .map(|&v| v as f32 - 0.2)
                .collect()
        })
        .collect();
    let refs: Vec<&[f32]> = frames.iter().map(Vec::as_slice).collect();
    write_tiff_f32(&p, 20, 10, &refs).unwrap();
    let (got, r) = read_all(&p);
    assert_eq!(r.kind(), PixelKind::F32);
    assert_eq!(got, frames);
}

/// A hand-written big-endian TIFF: `bits` 8/16/32 unsigned, tiled (16x16) or in strips.
fn tiff_be(w: usize, h: usize, bits: u16, tiled: bool, pages: &[Vec<u32>]) -> Vec<u8> {
    let mut out: Vec<u8> = b"MM\x00\x2a\x00\x00\x00\x00".to_vec();
    let put = |v: u32, bits: u16, o: &mut Vec<u8>| match bits {
        8 => o.push(v as u8),
        16 => o.extend_from_slice(&(v as u16).to_be_bytes()),
        _ => o.extend_from_slice(&v.to_be_bytes()),
    };
    let mut prev_next_ptr = 4usize;
    for px in pages {
        // pixel data
        let mut chunks = Vec::new();
        if tiled {
            let (tw, th) = (16, 16);
            for ty in 0..h.div_ceil(th) {
                for tx in 0..w.div_ceil(tw) {
                    let start = out.len();
                    for y in 0..th {
                        for x in 0..tw {
                            let (gx, gy) = (tx * tw + x, ty * th + y);
                            let v = if gx < w && gy < h { px[gy * w + gx] } else { 0 };
                            put(v, bits, &mut out);
                        }
                    }
                    chunks.push((start as u32, (out.len() - start) as u32));
                }
            }
        } else {
            let start = out.len();
            for &v in px {
                put(v, bits, &mut out);
            }
            chunks.push((start as u32, (out.len() - start) as u32));
        }
        // arrays of offsets / counts
        let offs_at = out.len();
        for c in &chunks {
            out.extend_from_slice(&c.0.to_be_bytes());
        }
        let cnts_at = out.len();
        for c in &chunks {
            out.extend_from_slice(&c.1.to_be_bytes());
        }
        if out.len() % 2 == 1 {
            out.push(0);
        }
        let ifd_at = out.len();
        out[prev_next_ptr..prev_next_ptr + 4].copy_from_slice(&(ifd_at as u32).to_be_bytes());
        let n = chunks.len() as u32;
        let arr = |at: usize| if n == 1 { None } else { Some(at as u32) };
        // (tag, type, count, value): type 3 SHORT, 4 LONG
        let mut e: Vec<(u16, u16, u32, u32)> = vec![
            (256, 4, 1, w as u32),
            (257, 4, 1, h as u32),
            (258, 3, 1, bits as u32),
            (259, 3, 1, 1),
            (262, 3, 1, 1),
        ];
        if tiled {
            e.push((277, 3, 1, 1));
            e.push((322, 4, 1, 16));
            e.push((323, 4, 1, 16));
            e.push((324, 4, n, arr(offs_at).unwrap_or(chunks[0].0)));
            e.push((325, 4, n, arr(cnts_at).unwrap_or(chunks[0].1)));
        } else {
            e.push((273, 4, 1, chunks[0].0));
            e.push((277, 3, 1, 1));
            e.push((278, 4, 1, h as u32));
            e.push((279, 4, 1, chunks[0].1));
        }
        e.push((339, 3, 1, 1));
        out.extend_from_slice(&(e.len() as u16).to_be_bytes());
        for (tag, ty, count, val) in e {
            out.extend_from_slice(&tag.to_be_bytes());
            out.extend_from_slice(&ty.to_be_bytes());
            out.extend_from_slice(&count.to_be_bytes());
            if ty == 3 && count == 1 {
                out.extend_from_slice(&(val as u16).to_be_bytes());
                out.extend_from_slice(&[0, 0]);
            } else {
                out.extend_from_slice(&val.to_be_bytes());
            }
        }
        prev_next_ptr = out.len();
        out.extend_from_slice(&[0, 0, 0, 0]);
    }
    out
}

#[test]
fn tiff_big_endian_strips_and_tiles_8_16_32_bit() {
    let d = tempfile::tempdir().unwrap();
    for (bits, max) in [(8u16, 255.0), (16, 65535.0), (32, 4.0e9)] {
        for tiled in [false, true] {
            let (w, h) = (40, 24);
            let pages: Vec<Vec<u32>> = (0..2)
                .map(|k| pattern(w, h, k, max).iter().map(|&v| v as u32).collect())
                .collect();
            let p = d.path().join(format!("be{bits}{tiled}.tif"));
            std::fs::write(&p, tiff_be(w, h, bits, tiled, &pages)).unwrap();
            let (got, r) = read_all(&p);
            assert_eq!(r.len(), Some(2), "bits {bits} tiled {tiled}");
            assert_eq!(got.len(), 2);
            for (g, f) in got.iter().zip(&pages) {
                for (a, &b) in g.iter().zip(f) {
                    assert_eq!(*a, b as f32, "bits {bits} tiled {tiled}");
                }
            }
        }
    }
}

fn write_npy(p: &Path, descr: &str, shape: &[usize], data: &[u8]) {
    let mut f = std::fs::File::create(p).unwrap();
    f.write_all(&npy_header(descr, shape)).unwrap();
    f.write_all(data).unwrap();
}

#[test]
fn npy_stacks_of_every_dtype_and_byte_order() {
    let d = tempfile::tempdir().unwrap();
    let (n, h, w) = (3, 5, 7);
    let vals: Vec<f64> = (0..n)
        .flat_map(|k| pattern(w, h, k, 200.0))
        .map(f64::round)
        .collect();
    type Enc = fn(f64, bool) -> Vec<u8>;
    let cases: [(&str, Enc); 5] = [
        ("u1", |v, _| vec![v as u8]),
        ("u2", |v, be| {
            if be {
                (v as u16).to_be_bytes().to_vec()
            } else {
                (v as u16).to_le_bytes().to_vec()
            }
        }),
        ("u4", |v, be| {
            if be {
                (v as u32).to_be_bytes().to_vec()
            } else {
                (v as u32).to_le_bytes().to_vec()
            }
        }),
        ("f4", |v, be| {
            if be {
                (v as f32).to_be_bytes().to_vec()
            } else {
                (v as f32).to_le_bytes().to_vec()
            }
        }),
        ("f8", |v, be| {
            if be {
                v.to_be_bytes().to_vec()
            } else {
                v.to_le_bytes().to_vec()
            }
        }),
    ];
    for (code, enc) in cases {
        for be in [false, true] {
            let descr = format!("{}{code}", if be { '>' } else { '<' });
            let bytes: Vec<u8> = vals.iter().flat_map(|&v| enc(v, be)).collect();
            let p = d.path().join(format!("{code}{be}.npy"));
            write_npy(&p, &descr, &[n, h, w], &bytes);
            let (got, r) = read_all(&p);
            assert_eq!((r.width(), r.height(), r.len()), (w, h, Some(n)), "{descr}");
            let flat: Vec<f32> = got.concat();
            assert!(
                flat.iter().zip(&vals).all(|(&a, &b)| a == b as f32),
                "{descr}"
            );
        }
    }
}

#[test]
fn npy_truncated_names_the_frame() {
    let d = tempfile::tempdir().unwrap();
    let p = d.path().join("t.npy");
    write_npy(&p, "<u2", &[4, 8, 8], &vec![1u8; 2 * 8 * 8 * 2 + 10]);
    let e = FrameReader::open(&p).err().unwrap();
    let m = e.to_string();
    assert!(
        m.contains("t.npy") && m.contains("frame 2") && m.contains("truncated"),
        "{m}"
    );
    assert_eq!(e.exit_code(), 2);
}

fn write_png(p: &Path, w: u32, h: u32, depth: png::BitDepth, data: &[u8]) {
    let f = std::fs::File::create(p).unwrap();
    let mut enc = png::Encoder::new(std::io::BufWriter::new(f), w, h);
    enc.set_color(png::ColorType::Grayscale);
    enc.set_depth(depth);
    let mut wr = enc.write_header().unwrap();
    wr.write_image_data(data).unwrap();
}

#[test]
fn png_8_and_16_bit_greyscale() {
    let d = tempfile::tempdir().unwrap();
    let (w, h) = (13, 9);
    let v8: Vec<u8> = pattern(w, h, 0, 255.0).iter().map(|&v| v as u8).collect();
    let p8 = d.path().join("a.png");
    write_png(&p8, w as u32, h as u32, png::BitDepth::Eight, &v8);
    let (g, r) = read_all(&p8);
    assert_eq!((r.kind(), g.len()), (PixelKind::U8, 1));
    assert!(g[0].iter().zip(&v8).all(|(&a, &b)| a == b as f32));
    let v16: Vec<u16> = pattern(w, h, 1, 65535.0)
        .iter()
        .map(|&v| v as u16)
        .collect();
    let bytes: Vec<u8> = v16.iter().flat_map(|v| v.to_be_bytes()).collect();
    let p16 = d.path().join("b.png");
    write_png(&p16, w as u32, h as u32, png::BitDepth::Sixteen, &bytes);
    let (g, r) = read_all(&p16);
    assert_eq!(r.kind(), PixelKind::U16);
    assert!(g[0].iter().zip(&v16).all(|(&a, &b)| a == b as f32));
}

fn u16_tiff(dir: &Path, name: &str, w: usize, h: usize, frames: &[Vec<u16>]) -> PathBuf {
    let p = dir.join(name);
    let refs: Vec<&[u16]> = frames.iter().map(Vec::as_slice).collect();
    write_tiff_u16(&p, w, h, &refs).unwrap();
    p
}

#[test]
fn stack_chains_files_and_mean_frame_averages() {
    let d = tempfile::tempdir().unwrap();
    let a = u16_tiff(d.path(), "a.tif", 4, 3, &[vec![1; 12], vec![3; 12]]);
    let b = u16_tiff(d.path(), "b.tif", 4, 3, &[vec![5; 12]]);
    let mut s = FrameStack::open(&[a.clone(), b]).unwrap();
    assert_eq!(s.len(), Some(3));
    let mut buf = vec![0f32; 12];
    let mut seen = Vec::new();
    while let Some(o) = s.read_next(&mut buf).unwrap() {
        seen.push((o.file, o.frame, buf[0]));
    }
    assert_eq!(seen, vec![(0, 0, 1.0), (0, 1, 3.0), (1, 0, 5.0)]);
    let (m, w, h) = mean_frame(&a).unwrap();
    assert_eq!((w, h), (4, 3));
    assert!(m.iter().all(|&v| v == 2.0));
}

#[test]
fn truncated_and_corrupt_tiff_are_named() {
    let d = tempfile::tempdir().unwrap();
    let frames: Vec<Vec<u16>> = (0..3).map(|k| vec![100 + k as u16; 64 * 64]).collect();
    let p = u16_tiff(d.path(), "full.tif", 64, 64, &frames);
    let bytes = std::fs::read(&p).unwrap();
    // cut inside the pixel data of the last page
    let cut = d.path().join("cut.tif");
    std::fs::write(&cut, &bytes[..bytes.len() * 3 / 4]).unwrap();
    let res = FrameStack::open(std::slice::from_ref(&cut)).and_then(|mut s| {
        let mut buf = vec![0f32; 64 * 64];
        while s.read_next(&mut buf)?.is_some() {}
        Ok(())
    });
    let e = res.unwrap_err();
    let m = e.to_string();
    assert!(m.contains("cut.tif") && m.contains("frame"), "{m}");
    assert_eq!(e.exit_code(), 2);
    let bad = d.path().join("bad.tif");
    std::fs::write(&bad, b"II*\x00garbage-not-a-tiff").unwrap();
    let m = FrameReader::open(&bad).err().unwrap().to_string();
    assert!(m.contains("bad.tif"), "{m}");
}

#[test]
fn mixed_sizes_nan_and_blank_frames_are_rejected_with_their_index() {
    let d = tempfile::tempdir().unwrap();
    let a = u16_tiff(d.path(), "a.tif", 8, 8, &[vec![7; 64]]);
    let b = u16_tiff(d.path(), "b.tif", 8, 6, &[vec![7; 48]]);
    let m = FrameStack::open(&[a.clone(), b]).err().unwrap().to_string();
    assert!(m.contains("b.tif") && m.contains("8x6"), "{m}");
    // a multi-page file whose second page has another size
    let p = d.path().join("mixed.tif");
    let mut w = modegram::frames::TiffStackWriter::create(&p).unwrap();
    w.write_u16(8, 8, &[1; 64]).unwrap();
    w.write_u16(4, 4, &[1; 16]).unwrap();
    w.finish().unwrap();
    let mut s = FrameStack::open(&[p]).unwrap();
    let mut buf = vec![0f32; 64];
    assert!(s.read_next(&mut buf).unwrap().is_some());
    let m = s.read_next(&mut buf).unwrap_err().to_string();
    assert!(m.contains("mixed.tif, frame 1") && m.contains("4x4"), "{m}");
    // NaN in frame 1
    let nan = d.path().join("nan.tif");
    let mut f1 = vec![1f32; 64];
    f1[9] = f32::NAN;
    write_tiff_f32(&nan, 8, 8, &[&[1f32; 64], &f1]).unwrap();
    let mut s = FrameStack::open(&[nan]).unwrap();
    s.read_next(&mut buf).unwrap();
    let m = s.read_next(&mut buf).unwrap_err().to_string();
    assert!(
        m.contains("nan.tif, frame 1") && m.contains("x 1, y 1"),
        "{m}"
    );
    // all-zero frame 0
    let z = u16_tiff(d.path(), "z.tif", 8, 8, &[vec![0; 64]]);
    let mut s = FrameStack::open(&[z]).unwrap();
    let e = s.read_next(&mut buf).unwrap_err();
    assert!(e.to_string().contains("z.tif, frame 0"), "{e}");
    assert_eq!(e.exit_code(), 2);
}

#[test]
fn saturation_level_is_the_format_maximum() {
    assert_eq!(PixelKind::U16.max_counts(), Some(65535.0));
    assert_eq!(PixelKind::U8.max_counts(), Some(255.0));
    assert_eq!(PixelKind::F32.max_counts(), None);
    let mut f = vec![10f32; 16 * 8];
    f[3 * 16 + 5] = 65535.0; // inside region [4, 2, 8, 4]
    f[0] = 65535.0; // outside
    f[5 * 16 + 11] = 70000.0; // inside, above
    assert_eq!(
        modegram::decode::count_saturated(&f, 16, [4, 2, 8, 4], 65535.0),
        2
    );
}
