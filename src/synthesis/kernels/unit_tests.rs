//! Unit tests of the kernels (a file of their own, beside `mod.rs`).

use super::*;
use num_complex::Complex64;

/// The polynomial phasor against libm's sin/cos on a dense sweep of reduced and large arguments.
#[test]
fn sincos_error_below_3e_11() {
    let mut worst = 0.0f64;
    for i in 0..200_001 {
        let t = -3.0 + 6.0 * i as f64 / 200_000.0;
        let (s, c) = sincos_cycles(t);
        let a = 2.0 * std::f64::consts::PI * t;
        worst = worst.max((s - a.sin()).abs()).max((c - a.cos()).abs());
    }
    for &t in &[12_345.678_9, 98765.4321, 1.0e6 + 0.25, -4.0e5 - 0.125] {
        let (s, c) = sincos_cycles(t);
        let frac = t - t.floor();
        let a = 2.0 * std::f64::consts::PI * frac;
        worst = worst.max((s - a.sin()).abs()).max((c - a.cos()).abs());
    }
    assert!(worst < 3e-11, "worst {worst:e}");
}

/// Every copy this CPU has (portable, AVX2, AVX-512) gives the portable copy's bits, for each
/// f64 kernel; and the portable copy agrees with the textbook formula, the wave
/// a / r exp(i 2 pi (r / lambda + phi)) (times z / r with obliquity) added inside the support
/// |d - d_R| <= lambda / 2p on both axes (physics.md, "Sampling"), so the test checks the kernels
/// on any CPU, not only where a wide copy exists.
#[test]
fn isa_copies_are_bit_identical() {
    let isas = available();
    eprintln!(
        "copies compared: {:?}",
        isas.iter().map(|i| i.name()).collect::<Vec<_>>()
    );
    let n = 103;
    let lambda = 633e-9;
    let xs: Vec<f64> = (0..n).map(|i| (i as f64 - 51.0) * 1.3e-6).collect();
    let rdx: Vec<f64> = (0..n).map(|i| 0.05 + 1e-4 * i as f64).collect();
    let rdy = vec![-0.02; n];
    let ri = RowInputs {
        xs: &xs,
        rdx: &rdx,
        rdy: &rdy,
        half_band: [0.2, 0.2],
        inv_lambda: 1.0 / lambda,
        taper_start: 1.0,
    };
    let same = |a: &[f64], b: &[f64]| a.iter().zip(b).all(|(x, y)| x.to_bits() == y.to_bits());
    for obliquity in [false, true] {
        let e = EmitterRow {
            xj: 3e-6,
            dy: -7e-6,
            z: 90e-6,
            amplitude: 0.7,
            phase_cycles: 0.3,
            obliquity,
        };
        // The textbook sum, with libm's sin and cos.
        let (c0, c1) = (3, n - 2);
        let mut want = (vec![0.1; n], vec![0.2; n]);
        let mut inside = 0u64;
        for i in c0..c1 {
            let dx = xs[i] - e.xj;
            let r = (dx * dx + e.dy * e.dy + e.z * e.z).sqrt();
            if (dx / r - rdx[i]).abs() <= 0.2 && (e.dy / r - rdy[i]).abs() <= 0.2 {
                inside += 1;
                let a = e.amplitude / r * if obliquity { e.z / r } else { 1.0 };
                let ph = 2.0 * std::f64::consts::PI * (r / lambda + e.phase_cycles);
                want.0[i] += a * ph.cos();
                want.1[i] += a * ph.sin();
            }
        }
        assert!(
            inside > 10 && inside < (c1 - c0) as u64,
            "the row must cross the support edge"
        );
        let mut first: Option<[Vec<f64>; 4]> = None;
        for &isa in &isas {
            let mut a = (vec![0.1; n], vec![0.2; n]);
            let na = accumulate_exact(isa, &ri, &e, c0, c1, &mut a.0, &mut a.1);
            let mut f = (vec![0.1; n], vec![0.2; n]);
            let nf = accumulate_fresnel(isa, &ri, &e, 0, n, &mut f.0, &mut f.1);
            assert_eq!(na, inside, "{}: support count", isa.name());
            assert!(nf > 0);
            match &first {
                None => {
                    // The portable copy against the formula: the phasor is within 3e-11 of
                    // libm's (sincos test above) and t's rounding adds about 1e-11 rad.
                    for i in 0..n {
                        let amp = e.amplitude / e.z;
                        for (got, w) in [(a.0[i], want.0[i]), (a.1[i], want.1[i])] {
                            assert!((got - w).abs() <= 1e-10 * amp, "pixel {i}: {got} vs {w}");
                        }
                    }
                    first = Some([a.0, a.1, f.0, f.1]);
                }
                Some(p) => {
                    assert!(
                        same(&a.0, &p[0]) && same(&a.1, &p[1]),
                        "{}: exact bits",
                        isa.name()
                    );
                    assert!(
                        same(&f.0, &p[2]) && same(&f.1, &p[3]),
                        "{}: fresnel bits",
                        isa.name()
                    );
                }
            }
        }
    }
    // conj_reference and mac in every copy, against the portable bits and the formula.
    let t: Vec<f64> = (0..n).map(|i| 0.013 * i as f64 - 0.4).collect();
    let re: Vec<f64> = (0..n).map(|i| (i as f64 * 0.7).sin()).collect();
    let im: Vec<f64> = (0..n).map(|i| (i as f64 * 0.3).cos()).collect();
    let mut first: Option<(Vec<Complex64>, Vec<f64>)> = None;
    for &isa in &isas {
        let mut out = vec![Complex64::new(0.0, 0.0); n];
        conj_reference(isa, &t, &re, &im, &mut out);
        let (mut mre, mut mim) = (re.clone(), im.clone());
        mac(isa, 0.3, -1.1, &t, &re, &mut mre, &mut mim);
        let flat: Vec<f64> = mre.iter().chain(&mim).copied().collect();
        match &first {
            None => {
                for i in 0..n {
                    let r = Complex64::from_polar(1.0, 2.0 * std::f64::consts::PI * t[i]);
                    let f = Complex64::new(re[i], im[i]) * r.conj();
                    assert!((out[i] - f).norm() < 1e-10, "conj_reference {i}");
                    let m = Complex64::new(re[i], im[i])
                        + Complex64::new(0.3, -1.1) * Complex64::new(t[i], re[i]);
                    assert!(
                        (Complex64::new(mre[i], mim[i]) - m).norm() < 1e-12,
                        "mac {i}"
                    );
                }
                first = Some((out, flat));
            }
            Some((o, m)) => {
                assert!(
                    out.iter()
                        .zip(o)
                        .all(|(a, b)| a.re.to_bits() == b.re.to_bits()
                            && a.im.to_bits() == b.im.to_bits()),
                    "{}: conj_reference bits",
                    isa.name()
                );
                assert!(same(&flat, m), "{}: mac bits", isa.name());
            }
        }
    }
}
