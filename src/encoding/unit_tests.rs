//! Unit tests of the encodings.

use super::*;

/// physics.md: with 2^b / N not an integer the stored values still spread over the full range:
/// level g stands for the phase 2 pi g / N, stored s = round(g 2^b / N).
#[test]
fn phase_levels_and_stored_values() {
    assert_eq!(phase_stored(1, 3), 85); // 256/3 = 85.33
    assert_eq!(phase_stored(2, 3), 171); // 512/3 = 170.67
    assert_eq!(phase_stored(255, 256), 255);
    assert_eq!(phase_stored(1, 257), 255); // 65536/257 = 255.0039
    assert_eq!(phase_stored(65535, 65536), 65535);
    // phi just below 2 pi rounds to level N, i.e. 0.
    let f = Complex64::from_polar(1.0, -1e-6);
    assert_eq!(phase_level(f, 4), 0);
    assert_eq!(phase_level(Complex64::new(0.0, 1.0), 4), 1);
    assert_eq!(phase_level(Complex64::new(-1.0, 1e-9), 4), 2);
}

#[test]
fn binary_conventions() {
    let neg = Complex64::new(-0.5, 3.0);
    let pos = Complex64::new(0.0, -3.0);
    assert_eq!(Encoding::BinaryPhase.sample(neg), 1);
    assert_eq!(Encoding::BinaryPhase.sample(pos), 0);
    assert_eq!(Encoding::BinaryAmplitude.sample(neg), 0);
    assert_eq!(Encoding::BinaryAmplitude.sample(pos), 1);
    let mut out = [0u8; 2];
    Encoding::BinaryAmplitude.encode_row(&[pos, neg, pos, neg, neg, neg, neg, neg, pos], &mut out);
    assert_eq!(out, [0b1010_0000, 0b1000_0000]);
}

/// `encode_row` (one loop per encoding) against the obvious per-pixel form built from
/// `sample`: TIFF's MSB-first bit packing (TIFF 6.0, FillOrder 1) and little-endian 16-bit
/// samples, on widths that do not fill the last byte.
#[test]
fn encode_row_matches_per_pixel_samples() {
    let mut state = 0x2545_f491_4f6c_dd1du64;
    let mut next = || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        (state >> 11) as f64 / (1u64 << 53) as f64 * 2.0 - 1.0
    };
    let mut f: Vec<Complex64> = (0..203).map(|_| Complex64::new(next(), next())).collect();
    // Zeros of each sign (atan2 gives 0, pi, -0 or -pi), and values on the axes.
    for (i, (re, im)) in [
        (0.0, 0.0),
        (-0.0, 0.0),
        (0.0, -0.0),
        (-0.0, -0.0),
        (-0.0, 1.0),
        (-1.0, 0.0),
        (-1.0, -0.0),
        (0.0, -2.0),
    ]
    .into_iter()
    .enumerate()
    {
        f[3 * i] = Complex64::new(re, im);
    }
    let encodings = [
        Encoding::BinaryAmplitude,
        Encoding::BinaryPhase,
        Encoding::Phase { levels: 3 },
        Encoding::Phase { levels: 256 },
        Encoding::Phase { levels: 1000 },
        Encoding::Phase { levels: 65536 },
        Encoding::CalibratedPhase {
            levels: 16,
            calibration: std::sync::Arc::new(
                Calibration::new(vec![(0, 0.0), (100, 3.0), (255, 6.2)], 16, "test").unwrap(),
            ),
        },
        Encoding::CalibratedPhase {
            levels: 300,
            calibration: std::sync::Arc::new(
                Calibration::new(vec![(0, 0.0), (30000, 3.0), (65535, 6.2)], 300, "test").unwrap(),
            ),
        },
        Encoding::Amplitude {
            bits: 8,
            scale: 0.7,
        },
        Encoding::Amplitude {
            bits: 16,
            scale: 0.7,
        },
    ];
    for e in encodings {
        for width in [1, 7, 8, 9, 203] {
            let row = &f[..width];
            let mut fast = vec![0xA5u8; e.row_bytes(width)];
            e.encode_row(row, &mut fast);
            let mut slow = vec![0u8; e.row_bytes(width)];
            for (i, &v) in row.iter().enumerate() {
                let s = e.sample(v);
                match e.bits_per_sample() {
                    1 => slow[i / 8] |= ((s != 0) as u8) << (7 - i % 8),
                    8 => slow[i] = s as u8,
                    _ => slow[2 * i..2 * i + 2].copy_from_slice(&s.to_le_bytes()),
                }
            }
            assert_eq!(fast, slow, "{e:?}, width {width}");
        }
    }
}

/// The polynomial arctangent against `f64::atan2` (the slow, obviously correct form) over
/// every octant, dense on [0, 1] in the ratio: inside [`ATAN_BOUND`], with the measured
/// largest error (4.7e-8 rad) at most half of it.
#[test]
fn fast_atan_stays_inside_its_bound() {
    let n = 1u32 << 16;
    let mut worst = 0.0f64;
    for k in 0..=200_000 {
        let a = k as f64 / 200_000.0;
        for (x, y) in [
            (1.0, a),
            (a, 1.0),
            (-1.0, a),
            (-a, 1.0),
            (1.0, -a),
            (-1.0, -a),
            (-a, -1.0),
            (a, -1.0),
        ] {
            let exact = {
                let mut p = f64::atan2(y, x);
                if p < 0.0 {
                    p += 2.0 * std::f64::consts::PI;
                }
                p * n as f64 / (2.0 * std::f64::consts::PI)
            };
            let d = (approx_level(Complex64::new(x, y), n as f64) - exact).abs();
            // The two sides of the cut at phase 0 are a whole turn apart.
            let d = d.min((d - n as f64).abs());
            worst = worst.max(d * 2.0 * std::f64::consts::PI / n as f64);
        }
    }
    assert!(
        worst <= ATAN_BOUND / 2.0,
        "largest arctangent error {worst:e} rad"
    );
    assert!(worst > 1e-9, "the polynomial is not this exact: {worst:e}");
}

/// `phase_levels_row` equals `phase_level` on random F, on F placed on and next to every
/// rounding edge, on the axes, signed zeros, huge, tiny and non-finite values.
#[test]
fn fast_phase_levels_equal_the_formula() {
    let mut state = 0x9e37_79b9_7f4a_7c15u64;
    let mut next = || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    for levels in [2u32, 3, 7, 8, 16, 256, 257, 1000, 4096, 65536] {
        let mut f = Vec::new();
        for _ in 0..4000 {
            f.push(Complex64::new(next() * 2.0 - 1.0, next() * 2.0 - 1.0));
        }
        for k in 0..levels.min(3000) {
            // Exactly on an edge (to f64 rounding), and a hair either side.
            let phi = 2.0 * std::f64::consts::PI * (k as f64 + 0.5) / levels as f64;
            for d in [0.0, 1e-15, -1e-15, 1e-12, -1e-12, 1e-9, -1e-9] {
                f.push(Complex64::from_polar(0.3 + next(), phi + d));
            }
        }
        for v in [
            Complex64::new(0.0, 0.0),
            Complex64::new(-0.0, 0.0),
            Complex64::new(0.0, -0.0),
            Complex64::new(-0.0, -0.0),
            Complex64::new(1.0, 0.0),
            Complex64::new(-1.0, 0.0),
            Complex64::new(-1.0, -0.0),
            Complex64::new(0.0, 1.0),
            Complex64::new(0.0, -1.0),
            Complex64::new(1e300, -1e-300),
            Complex64::new(-1e-310, 1e-310),
            Complex64::new(f64::INFINITY, 1.0),
            Complex64::new(f64::NAN, 1.0),
        ] {
            f.push(v);
        }
        let mut got = vec![u32::MAX; f.len()];
        phase_levels_row(&f, levels, &mut got);
        for (k, (&v, &g)) in f.iter().zip(&got).enumerate() {
            assert_eq!(g, phase_level(v, levels), "levels {levels}, F[{k}] = {v}");
        }
    }
}

#[test]
fn amplitude_mapping_clips() {
    assert_eq!(amplitude_sample(0.0, 1.0, 8), 128); // 127.5 rounds half away from zero
    assert_eq!(amplitude_sample(1.0, 1.0, 8), 255);
    assert_eq!(amplitude_sample(-5.0, 1.0, 8), 0);
    assert_eq!(amplitude_sample(7.0, 1.0, 16), 65535);
}

/// A linear panel reaching 2 pi at grey 200 stops one grey step short of 2 pi at grey 199: not
/// short. A panel reaching 5 rad at grey 255 is short; one reaching 2 pi - half a level is not.
#[test]
fn short_of_two_pi_allows_the_last_grey_step() {
    let tau = 2.0 * std::f64::consts::PI;
    let linear = Calibration::new(vec![(0, 0.0), (200, tau)], 256, "two_pi_grey = 200").unwrap();
    assert_eq!(linear.level_to_grey.iter().max(), Some(&199));
    assert!((tau - linear.stroke - tau / 200.0).abs() < 1e-12);
    assert!(!linear.short_of_two_pi(256));
    let five = Calibration::new(vec![(0, 0.0), (255, 5.0)], 256, "short").unwrap();
    assert!(five.short_of_two_pi(256));
    let near = Calibration::new(vec![(0, 0.0), (255, tau - 0.5 * tau / 16.0)], 16, "near").unwrap();
    assert!(!near.short_of_two_pi(16));
    assert!(near.short_of_two_pi(256));
}
