//! Helpers shared by the integration tests.
#![allow(dead_code)]

use std::path::Path;

use tiff::decoder::{Decoder, DecodingResult};

/// Decoded samples as u16, one per pixel (1-bit rows unpacked MSB first): (width, height, samples).
pub fn decode(path: &Path) -> (u32, u32, Vec<u16>) {
    let mut d = Decoder::new(std::fs::File::open(path).unwrap()).unwrap();
    let (w, h) = d.dimensions().unwrap();
    let img = d.read_image().unwrap();
    let v = match img {
        DecodingResult::U8(b) => {
            if b.len() == (w as usize * h as usize) {
                b.into_iter().map(u16::from).collect()
            } else {
                let rb = (w as usize).div_ceil(8);
                let mut out = Vec::new();
                for r in 0..h as usize {
                    for c in 0..w as usize {
                        out.push(((b[r * rb + c / 8] >> (7 - c % 8)) & 1) as u16);
                    }
                }
                out
            }
        }
        DecodingResult::U16(v) => v,
        other => panic!(
            "unexpected sample type {:?}",
            std::mem::discriminant(&other)
        ),
    };
    (w, h, v)
}

/// The peak memory (MiB) a `run --stats` printed on stderr.
pub fn peak_mib(stderr: &str) -> f64 {
    let l = stderr
        .lines()
        .find(|l| l.contains("peak memory"))
        .unwrap_or_else(|| panic!("no stats in {stderr}"));
    l.split("peak memory ")
        .nth(1)
        .unwrap()
        .trim_end_matches(" MiB")
        .parse()
        .unwrap()
}
