//! A plate as written: its TIFF (or field files) and sidecar, opened and checked, read window by
//! window (only the strips a window needs).

use std::path::{Path, PathBuf};

use tiff::decoder::{Decoder, DecodingResult};

use crate::encoding::Encoding;
use crate::error::{Error, Result};
use crate::optics::{Plate, Reference};
use crate::output::sidecar::{EncodingRecord, OutputFiles, ReferenceRecord, Sidecar};

/// A plate on disk with what its sidecar says about it.
#[derive(Clone, Debug)]
pub struct PlateFile {
    /// The TIFF.
    pub tif: PathBuf,
    /// Geometry and wavelength.
    pub plate: Plate,
    /// The reference it was computed with.
    pub reference: Reference,
    /// The encoding of its samples.
    pub encoding: Encoding,
    /// Field files (a plate written as fields), or empty for one TIFF.
    pub fields: Vec<FieldFile>,
    /// The plate was designed for a real image at +D (iterative synthesis in Fresnel
    /// geometry: its target planes lie at +D along the propagation); depth replays then
    /// propagate by +D and draw the plane as the target was given, instead of the virtual image
    /// at -D seen by the viewer.
    pub real_image: bool,
    /// Size and SHA-256 of the TIFF as its sidecar records them (single-TIFF plates).
    pub recorded: Option<(u64, String)>,
    /// A spot-list design: its lens's focal length (metres) and the spots where the plate puts
    /// them under normal illumination (carrier and lens term included), for figures per spot.
    pub spots: Option<(f64, Vec<crate::synthesis::spots::Spot>)>,
    /// The Zernike part of the correction written into the pattern (the measured map is not
    /// kept in the sidecar).
    pub correction: Option<crate::optics::zernike::Correction>,
}

/// One field file of a plate written as fields: what replay takes of the manifest's entry
/// ([`crate::output::manifest::FieldEntry`]).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct FieldFile {
    /// File name, beside the manifest.
    pub file: String,
    /// Plate pixel of its top-left corner [column, row].
    pub first_px: [u32; 2],
    /// Its size [columns, rows].
    pub size_px: [u32; 2],
    /// SHA-256 of the file, as the manifest records it.
    pub sha256: String,
}

/// A rectangle of plate pixels: first column, first row, width, height.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Window {
    /// First column.
    pub x: u32,
    /// First row (0 = top).
    pub y: u32,
    /// Columns.
    pub w: u32,
    /// Rows.
    pub h: u32,
}

impl Window {
    /// Parses `X,Y,W,H`.
    pub fn parse(s: &str) -> std::result::Result<Window, String> {
        let v: Vec<u32> = s
            .split(',')
            .map(|t| t.trim().parse::<u32>())
            .collect::<std::result::Result<_, _>>()
            .map_err(|_| format!("'{s}': expected X,Y,W,H in whole pixels"))?;
        if v.len() != 4 || v[2] == 0 || v[3] == 0 {
            return Err(format!("'{s}': expected X,Y,W,H with W, H > 0"));
        }
        Ok(Window {
            x: v[0],
            y: v[1],
            w: v[2],
            h: v[3],
        })
    }
}

/// Sidecar path of a TIFF (`NAME.json`).
pub fn sidecar_of(tif: &Path) -> PathBuf {
    tif.with_extension("json")
}

impl PlateFile {
    /// Checks that the TIFF is the one its sidecar describes (size and SHA-256), so a plate and
    /// a sidecar of different runs are never replayed together. Reads the whole file.
    pub fn verify(&self) -> Result<()> {
        // Fields: each file against the manifest's SHA-256.
        let dir = self.tif.parent().map(PathBuf::from).unwrap_or_default();
        for f in self.fields.iter().filter(|f| !f.sha256.is_empty()) {
            let path = dir.join(&f.file);
            let (_, h) = crate::output::tiff::hash_path(&path)?;
            if h != f.sha256 {
                return Err(Error::input(
                    &path,
                    "is not the field its manifest describes (SHA-256 differs): damaged or from another run; run the job again (or --no-verify to replay anyway)",
                ));
            }
        }
        let Some((bytes, sha)) = &self.recorded else {
            return Ok(());
        };
        let (n, h) = crate::output::tiff::hash_path(&self.tif)?;
        if n != *bytes || h != *sha {
            return Err(Error::input(
                &self.tif,
                format!(
                    "is not the TIFF its sidecar {} describes (SHA-256 {}..., sidecar says {}...): a plate and a sidecar of different runs; run the job again (or --no-verify to replay anyway)",
                    sidecar_of(&self.tif).display(),
                    &h[..12.min(h.len())],
                    &sha[..12.min(sha.len())]
                ),
            ));
        }
        Ok(())
    }

    /// Opens a plate: reads its sidecar (`NAME.json` beside `NAME.tif`) and checks the TIFF's size.
    pub fn open(tif: &Path) -> Result<PlateFile> {
        // A plate written as fields may be named by its manifest NAME.fields.json.
        let tif = &match tif.to_str().and_then(|t| t.strip_suffix(".fields.json")) {
            Some(stem) => PathBuf::from(format!("{stem}.tif")),
            None => tif.to_path_buf(),
        };
        let sc = sidecar_of(tif);
        let side = Sidecar::read(&sc)?;
        let h = &side.hologram;
        let plate = Plate {
            width: h.width_px,
            height: h.height_px,
            pitch: [
                positive(&sc, h.pitch_um[0], "hologram.pitch_um")? * 1e-6,
                positive(&sc, h.pitch_um[1], "hologram.pitch_um")? * 1e-6,
            ],
            wavelength: positive(&sc, h.wavelength_nm, "hologram.wavelength_nm")? * 1e-9,
        };
        let reference = match side.reference {
            ReferenceRecord::Plane { tilt_deg } => {
                finite(&sc, &tilt_deg, "reference.tilt_deg")?;
                Reference::Plane {
                    tilt: tilt_deg.map(f64::to_radians),
                }
            }
            ReferenceRecord::Spherical { position_mm } => {
                finite(&sc, &position_mm, "reference.position_mm")?;
                Reference::Spherical {
                    position: position_mm.map(|v| v * 1e-3),
                }
            }
        };
        let encoding = read_encoding(&sc, side.encoding.clone())?;
        let fields = read_fields(tif, &sc, &side, &plate, &encoding)?;
        let real_image = side
            .iterative
            .as_ref()
            .is_some_and(|i| i.geometry == "fresnel");
        let spots = read_spots(&sc, &side)?;
        let correction = read_correction(&sc, &side)?;
        Ok(PlateFile {
            tif: tif.to_path_buf(),
            plate,
            reference,
            encoding,
            fields,
            real_image,
            recorded: match &side.output {
                OutputFiles::Tiff { bytes, sha256, .. } => Some((*bytes, sha256.clone())),
                _ => None,
            },
            spots,
            correction,
        })
    }

    /// Stored samples of a window, row-major; reads only the strips that overlap it.
    pub fn read_window(&self, win: Window) -> Result<Vec<u16>> {
        let p = &self.plate;
        if win.x as u64 + win.w as u64 > p.width as u64
            || win.y as u64 + win.h as u64 > p.height as u64
        {
            return Err(Error::job(
                &self.tif,
                format!(
                    "window {},{},{},{} leaves the {} x {} plate",
                    win.x, win.y, win.w, win.h, p.width, p.height
                ),
            ));
        }
        if self.fields.is_empty() {
            return self.read_tiff_window(&self.tif, win);
        }
        // Fields: each one overlapping the window gives its part.
        let mut out = vec![0u16; win.w as usize * win.h as usize];
        for f in &self.fields {
            let x0 = win.x.max(f.first_px[0]);
            let y0 = win.y.max(f.first_px[1]);
            let x1 = (win.x + win.w).min(f.first_px[0] + f.size_px[0]);
            let y1 = (win.y + win.h).min(f.first_px[1] + f.size_px[1]);
            if x0 >= x1 || y0 >= y1 {
                continue;
            }
            let part = self.read_tiff_window(
                &self.tif.with_file_name(&f.file),
                Window {
                    x: x0 - f.first_px[0],
                    y: y0 - f.first_px[1],
                    w: x1 - x0,
                    h: y1 - y0,
                },
            )?;
            let pw = (x1 - x0) as usize;
            for (r, row) in part.chunks_exact(pw).enumerate() {
                let o = (y0 - win.y) as usize + r;
                let c = (x0 - win.x) as usize;
                out[o * win.w as usize + c..][..pw].copy_from_slice(row);
            }
        }
        Ok(out)
    }

    /// Stored samples of a window of one TIFF (the plate's, or one field's, in its own pixels).
    fn read_tiff_window(&self, tif: &Path, win: Window) -> Result<Vec<u16>> {
        let f = std::fs::File::open(tif).map_err(|e| Error::io(tif, e))?;
        let mut d = Decoder::new(std::io::BufReader::new(f))
            .map_err(|e| Error::input(tif, e.to_string()))?;
        let (_, rps) = d.chunk_dimensions();
        let rps = rps.max(1);
        let bad = |e: tiff::TiffError| Error::input(tif, format!("cannot read strip: {e}"));
        let mut out = Vec::with_capacity(win.w as usize * win.h as usize);
        let bits = self.encoding.bits_per_sample();
        for s in win.y / rps..=(win.y + win.h - 1) / rps {
            let chunk = d.read_chunk(s).map_err(bad)?;
            let (cw, ch) = d.chunk_data_dimensions(s);
            for r in 0..ch {
                let row = s * rps + r;
                if row < win.y || row >= win.y + win.h {
                    continue;
                }
                let cols = win.x as usize..(win.x + win.w) as usize;
                match (&chunk, bits) {
                    (DecodingResult::U8(b), 1) => {
                        let rb = (cw as usize).div_ceil(8);
                        let base = r as usize * rb;
                        out.extend(cols.map(|c| ((b[base + c / 8] >> (7 - c % 8)) & 1) as u16));
                    }
                    (DecodingResult::U8(b), 8) => {
                        let base = r as usize * cw as usize;
                        out.extend(cols.map(|c| b[base + c] as u16));
                    }
                    (DecodingResult::U16(b), 16) => {
                        let base = r as usize * cw as usize;
                        out.extend(cols.map(|c| b[base + c]));
                    }
                    _ => {
                        return Err(Error::input(
                            tif,
                            format!(
                                "sample type does not match the {bits}-bit encoding of its sidecar"
                            ),
                        ))
                    }
                }
            }
        }
        Ok(out)
    }
}

/// Checks that `tif` is a readable TIFF of `size` = [columns, rows].
fn check_tiff_size(tif: &Path, size: [u32; 2], bits: u8) -> Result<()> {
    let f = std::fs::File::open(tif).map_err(|e| Error::io(tif, e))?;
    let mut d = Decoder::new(std::io::BufReader::new(f))
        .map_err(|e| Error::input(tif, format!("not a readable TIFF: {e}")))?;
    let (w, h) = d
        .dimensions()
        .map_err(|e| Error::input(tif, e.to_string()))?;
    if [w, h] != size {
        return Err(Error::input(
            tif,
            format!(
                "is {w} x {h} px but its sidecar says {} x {}",
                size[0], size[1]
            ),
        ));
    }
    // The plate's own layout: one grey sample per pixel of the sidecar's bit depth, in strips
    // (a tiled or colour TIFF is not a plate this tool wrote, whatever its sidecar says).
    if d.get_tag_u32(tiff::tags::Tag::TileWidth).is_ok() {
        return Err(Error::unsupported(
            tif,
            "is a tiled TIFF; plates are stored in strips (write it again with fringemill)",
        ));
    }
    match d.colortype() {
        Ok(tiff::ColorType::Gray(b)) if b == bits => {}
        Ok(other) => {
            return Err(Error::input(
                tif,
                format!(
                "holds {other:?} samples; its sidecar says one grey sample of {bits} bit per pixel"
            ),
            ))
        }
        Err(e) => return Err(Error::input(tif, format!("unreadable sample layout: {e}"))),
    }
    Ok(())
}

/// `v` if finite and > 0, else the sidecar's error naming the key.
fn positive(sc: &Path, v: f64, key: &str) -> Result<f64> {
    if v.is_finite() && v > 0.0 {
        Ok(v)
    } else {
        Err(Error::input(
            sc,
            format!("sidecar field {key} = {v} must be > 0"),
        ))
    }
}

/// Every value finite, else the sidecar's error naming the key.
fn finite(sc: &Path, v: &[f64], key: &str) -> Result<()> {
    if v.iter().all(|x| x.is_finite()) {
        Ok(())
    } else {
        Err(Error::input(
            sc,
            format!("sidecar field {key} is not finite"),
        ))
    }
}

/// The encoding a sidecar records (a calibration rebuilt and checked against its map).
fn read_encoding(sc: &Path, rec: EncodingRecord) -> Result<Encoding> {
    Ok(match rec {
        EncodingRecord::Phase {
            levels,
            calibration,
            ..
        } => match calibration {
            None => Encoding::Phase { levels },
            Some(c) => {
                let calibration = crate::encoding::Calibration::new(c.table, levels, c.source)
                    .map_err(|m| Error::input(sc, format!("encoding.calibration: {m}")))?;
                if calibration.level_to_grey != c.level_to_grey {
                    return Err(Error::input(
                        sc,
                        "encoding.calibration.level_to_grey does not follow from its table by this version's rule; replay the plate with the version that wrote it",
                    ));
                }
                Encoding::CalibratedPhase {
                    levels,
                    calibration: std::sync::Arc::new(calibration),
                }
            }
        },
        EncodingRecord::BinaryPhase { .. } => Encoding::BinaryPhase,
        EncodingRecord::BinaryAmplitude { .. } => Encoding::BinaryAmplitude,
        EncodingRecord::Amplitude {
            bits_per_sample,
            bipolar_scale,
            ..
        } => Encoding::Amplitude {
            bits: bits_per_sample,
            scale: positive(sc, bipolar_scale, "encoding.bipolar_scale")?,
        },
    })
}

/// The field files of a plate written as fields (the manifest checked against the sidecar and
/// the plate), or none for a single TIFF (its size checked); GDSII and PNG are refused.
fn read_fields(
    tif: &Path,
    sc: &Path,
    side: &Sidecar,
    plate: &Plate,
    encoding: &Encoding,
) -> Result<Vec<FieldFile>> {
    Ok(match &side.output {
        OutputFiles::Gdsii { .. } | OutputFiles::Png { .. } => {
            return Err(Error::unsupported(
                tif,
                "is a GDSII layout or a panel PNG; reconstruct replays TIFF plates (run the same job with [output] format = \"tiff\": the samples are the same)",
            ))
        }
        OutputFiles::Tiff { .. } => {
            check_tiff_size(tif, [plate.width, plate.height], encoding.bits_per_sample())?;
            Vec::new()
        }
        OutputFiles::Fields {
            fields_manifest, ..
        } => {
            let name = fields_manifest
                .as_deref()
                .ok_or_else(|| Error::input(sc, "output.fields_manifest is missing"))?;
            let mp = tif.with_file_name(name);
            let bytes = std::fs::read(&mp).map_err(|e| Error::io(&mp, e))?;
            if let OutputFiles::Fields {
                fields_manifest_sha256: Some(want),
                ..
            } = &side.output
            {
                use sha2::Digest;
                let got: String = sha2::Sha256::digest(&bytes)
                    .iter()
                    .map(|b| format!("{b:02x}"))
                    .collect();
                if &got != want {
                    return Err(Error::input(
                        &mp,
                        format!("is not the manifest its sidecar {} describes (SHA-256 differs): a manifest and a sidecar of different runs; run the job again", sc.display()),
                    ));
                }
            }
            let m: crate::output::manifest::FieldsManifest = serde_json::from_slice(&bytes)
                .map_err(|e| Error::input(&mp, format!("not a fields manifest: {e}")))?;
            if m.format != crate::output::manifest::FORMAT || m.plate_px != [plate.width, plate.height] {
                return Err(Error::input(
                    &mp,
                    format!(
                        "not the fields manifest of this {} x {} plate",
                        plate.width, plate.height
                    ),
                ));
            }
            // The fields must tile the plate exactly, each file of its stated size.
            let mut covered = 0u64;
            for f in &m.fields {
                let fits = f.first_px[0] as u64 + f.size_px[0] as u64 <= plate.width as u64
                    && f.first_px[1] as u64 + f.size_px[1] as u64 <= plate.height as u64;
                if !fits || f.file.contains('/') || f.file.contains('\\') {
                    return Err(Error::input(
                        &mp,
                        format!("field {} leaves the plate", f.file),
                    ));
                }
                check_tiff_size(
                    &tif.with_file_name(&f.file),
                    f.size_px,
                    encoding.bits_per_sample(),
                )?;
                covered += f.size_px[0] as u64 * f.size_px[1] as u64;
            }
            if covered != plate.pixels() {
                return Err(Error::input(&mp, "the fields do not cover the plate once"));
            }
            m.fields
                .into_iter()
                .map(|f| FieldFile {
                    file: f.file,
                    first_px: f.first_px,
                    size_px: f.size_px,
                    sha256: f.sha256,
                })
                .collect()
        }
    })
}

/// The spots of a spot-list plate (design focal length, spots where the plate puts them).
fn read_spots(
    sc: &Path,
    side: &Sidecar,
) -> Result<Option<(f64, Vec<crate::synthesis::spots::Spot>)>> {
    Ok(
        match side.iterative.as_ref().map(|i| (i.focal_mm, &i.spots)) {
            Some((Some(f), Some(sp))) => {
                let f = positive(sc, f, "iterative.focal_mm")? * 1e-3;
                let mut v = Vec::with_capacity(sp.spots.len());
                for s in &sp.spots {
                    let [x, y, z] = s.replayed_at_um;
                    finite(sc, &[x, y, z, s.weight], "iterative.spots")?;
                    v.push(crate::synthesis::spots::Spot {
                        x: x / 1e6,
                        y: y / 1e6,
                        z: z / 1e6,
                        weight: positive(sc, s.weight, "iterative.spots weight")?,
                        phase: s.phase_rad,
                    });
                }
                Some((f, v))
            }
            _ => None,
        },
    )
}

/// The Zernike correction an iterative plate carries (its map is not replayed).
fn read_correction(
    sc: &Path,
    side: &Sidecar,
) -> Result<Option<crate::optics::zernike::Correction>> {
    Ok(
        match side.iterative.as_ref().and_then(|i| i.correction.as_ref()) {
            Some(c) if !c.zernike.is_empty() => {
                let mut terms = Vec::new();
                for t in &c.zernike {
                    if t[0].fract() != 0.0 || t[1].fract() != 0.0 || t[0] < 0.0 || t[1].abs() > 1e3
                    {
                        return Err(Error::input(
                        sc,
                        format!("sidecar iterative.correction.zernike: n = {} and m = {} must be whole numbers", t[0], t[1]),
                    ));
                    }
                    let term = crate::optics::zernike::ZernikeTerm::new(
                        t[0] as u32,
                        t[1] as i32,
                        t[2],
                        "sidecar iterative.correction.zernike",
                    )
                    .map_err(|m| Error::input(sc, m))?;
                    terms.push(term);
                }
                finite(
                    sc,
                    &c.pupil_centre_mm,
                    "iterative.correction.pupil_centre_mm",
                )?;
                Some(crate::optics::zernike::Correction {
                    terms,
                    pupil_radius: positive(
                        sc,
                        c.pupil_radius_mm,
                        "iterative.correction.pupil_radius_mm",
                    )? * 1e-3,
                    pupil_centre: c.pupil_centre_mm.map(|v| v * 1e-3),
                    map: None,
                })
            }
            _ => None,
        },
    )
}
