//! Command-line definition: one place per command and option, with its help text.
//! Parsing only; the work happens in the library (`job`).

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};
use fringemill::job::Shard;
use fringemill::replay::{metrics::ToneScale, Illumination, Window};

/// fringemill: computes fringe patterns (holograms) for mask writers and phase modulators.
#[derive(Parser, Debug)]
#[command(name = "fringemill", version, about, long_about = None)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
    /// Common options.
    #[command(flatten)]
    pub common: Common,
}

/// Options every command takes.
#[derive(Args, Debug, Clone)]
pub struct Common {
    /// No progress display.
    #[arg(long, short = 'q', global = true)]
    pub quiet: bool,
    /// Plain progress lines on stderr even on a terminal (the default when stderr is not a terminal).
    #[arg(long, global = true)]
    pub log_progress: bool,
    /// After each job, print elapsed time, throughput and peak memory on stderr.
    #[arg(long, global = true)]
    pub stats: bool,
    /// Worker threads (default: all cores).
    #[arg(long, global = true, value_name = "N", value_parser = parse_threads)]
    pub threads: Option<usize>,
}

/// The commands.
#[derive(Subcommand, Debug)]
pub enum Command {
    /// Computes the plate of each job file (or of every .toml in a folder) and writes TIFF + sidecar.
    Run {
        /// Job files or folders of job files.
        #[arg(required = true, value_name = "JOB")]
        jobs: Vec<PathBuf>,
        /// Discard the partial work of an interrupted run instead of continuing it.
        #[arg(long)]
        restart: bool,
        /// Compute only share K of N (1-based, e.g. 2/4) into a part file for `assemble`;
        /// `slurm` takes K and N from the job-array environment.
        #[arg(long, value_name = "K/N|slurm", value_parser = parse_shard)]
        shard: Option<Shard>,
        /// Least seconds between two checkpoints of the journal (default 30).
        #[arg(long, value_name = "S", default_value = "30", value_parser = parse_seconds, allow_hyphen_values = true)]
        checkpoint_secs: std::time::Duration,
    },
    /// Streams the finished shards' parts into the plate's TIFF and sidecar.
    Assemble {
        /// Job file.
        #[arg(value_name = "JOB")]
        job: PathBuf,
    },
    /// Replays a plate numerically: intensity images at chosen depths plus metrics (JSON).
    Reconstruct(ReconstructArgs),
    /// Writes a job's emitters (position, amplitude, phase, normal, channel) as a PLY point cloud.
    Sample {
        /// Job file.
        #[arg(value_name = "JOB")]
        job: PathBuf,
        /// Output PLY file.
        #[arg(long, value_name = "FILE.ply")]
        out: PathBuf,
    },
    /// Validates a job without computing and prints what a run will do.
    Plan {
        /// Job file.
        #[arg(value_name = "JOB")]
        job: PathBuf,
    },
}

/// `reconstruct`'s arguments.
#[derive(Args, Debug)]
pub struct ReconstructArgs {
    /// The plate TIFF (its sidecar NAME.json must sit beside it).
    #[arg(value_name = "PLATE.tif")]
    pub plate: PathBuf,
    /// Depth in front of the plate, mm: D, or a stack A:B:STEP.
    #[arg(
        long,
        value_name = "D|A:B:STEP",
        required_unless_present = "focal_mm",
        conflicts_with = "focal_mm",
        value_parser = parse_distances
    )]
    pub distance_mm: Option<Distances>,
    /// Replay through a lens of this focal length (mm) onto its focal plane (Fourier geometry).
    #[arg(long, value_name = "F", value_parser = parse_focal_m, allow_hyphen_values = true)]
    pub focal_mm: Option<f64>,
    /// Replay only this window of the plate: first column, first row, width, height (pixels).
    #[arg(long, value_name = "X,Y,W,H", value_parser = Window::parse)]
    pub window: Option<Window>,
    /// Light the plate with a plane wave at these tilts (degrees) instead of the recorded reference.
    #[arg(long, value_name = "TX,TY", value_parser = parse_illumination, allow_hyphen_values = true)]
    pub illumination: Option<Illumination>,
    /// Output PNG (default: PLATE-replay.png); metrics go to the same name with .json.
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
    /// Grey mapping: linear, gamma or log.
    #[arg(long, default_value = "gamma", value_parser = ToneScale::parse)]
    pub scale: ToneScale,
    /// PNG bits per sample: 8 or 16.
    #[arg(long, default_value = "8", value_parser = parse_png_bits)]
    pub bits: u8,
    /// Region of the replay image for power fraction, uniformity, speckle contrast: X,Y,W,H pixels.
    #[arg(long, value_name = "X,Y,W,H", value_parser = Window::parse)]
    pub region: Option<Window>,
    /// Target image (PNG, same size as the replay) for correlation and RMSE.
    #[arg(long, value_name = "PNG")]
    pub target: Option<PathBuf>,
    /// Number of intensity peaks to report.
    #[arg(long, default_value_t = 10)]
    pub peaks: usize,
    /// Fourier replays: also replay K times finer (zero padding; K = 2..8), written as
    /// OUT-osK.png, with the target's flat top measured between the designed samples.
    #[arg(long, value_name = "K", value_parser = clap::value_parser!(u8).range(2..=8))]
    pub oversample: Option<u8>,
    /// Skip checking the TIFF against its sidecar's SHA-256 (which reads the whole plate).
    #[arg(long)]
    pub no_verify: bool,
    /// Fourier replays of modulator patterns: the panel's fill factor F (0 < F <= 1), for
    /// the zero order's strength (dead area passes light unmodulated).
    #[arg(long, value_name = "F", value_parser = parse_fill_factor)]
    pub fill_factor: Option<f64>,
}

impl ReconstructArgs {
    /// The library's request: the default image name `PLATE-replay.png` beside the plate, the
    /// recorded reference unless `--illumination` says otherwise.
    pub fn into_request(self) -> fringemill::replay::ReconstructRequest {
        let out = self.out.unwrap_or_else(|| {
            let stem = self
                .plate
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_else(|| "plate".into());
            self.plate.with_file_name(format!("{stem}-replay.png"))
        });
        fringemill::replay::ReconstructRequest {
            tif: self.plate,
            distances: self.distance_mm.map(|d| d.0).unwrap_or_default(),
            focal: self.focal_mm,
            window: self.window,
            illumination: self.illumination.unwrap_or(Illumination::Recorded),
            out,
            scale: self.scale,
            bits: self.bits,
            region: self
                .region
                .map(|w| [w.x as usize, w.y as usize, w.w as usize, w.h as usize]),
            target: self.target,
            peaks: self.peaks,
            oversample: self.oversample.map(usize::from),
            verify: !self.no_verify,
            fill_factor: self.fill_factor,
        }
    }
}

/// Replay depths, metres (from `--distance-mm D|A:B:STEP`).
#[derive(Clone, Debug, PartialEq)]
pub struct Distances(pub Vec<f64>);

fn parse_distances(s: &str) -> Result<Distances, String> {
    fringemill::replay::parse_distances_mm(s).map(Distances)
}

fn parse_fill_factor(s: &str) -> Result<f64, String> {
    match s.parse::<f64>() {
        Ok(f) if f > 0.0 && f <= 1.0 => Ok(f),
        _ => Err(format!("'{s}': expected a number with 0 < F <= 1")),
    }
}

/// Most worker threads accepted: 8 per core (at least 64). More only thrash the machine.
fn max_threads() -> usize {
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    (8 * cores).max(64)
}

fn parse_threads(s: &str) -> Result<usize, String> {
    let cap = max_threads();
    match s.trim().parse::<usize>() {
        Ok(n) if (1..=cap).contains(&n) => Ok(n),
        Ok(n) if n > cap => Err(format!(
            "'{s}': at most {cap} threads on this machine (8 per core)"
        )),
        _ => Err(format!(
            "'{s}': expected a whole number of threads, at least 1"
        )),
    }
}

fn parse_shard(s: &str) -> Result<Shard, String> {
    Shard::parse(s)
}

fn parse_seconds(s: &str) -> Result<std::time::Duration, String> {
    match s.trim().parse::<f64>() {
        Ok(v) if v.is_finite() && v >= 0.0 => Ok(std::time::Duration::from_secs_f64(v)),
        _ => Err(format!("'{s}': expected seconds >= 0")),
    }
}

/// `--focal-mm F` in metres.
fn parse_focal_m(s: &str) -> Result<f64, String> {
    match s.trim().parse::<f64>() {
        Ok(f) if f.is_finite() && f > 0.0 => Ok(f * 1e-3),
        _ => Err(format!("'{s}': expected a focal length in mm, > 0")),
    }
}

/// `--illumination TX,TY` (degrees) as a plane wave.
fn parse_illumination(s: &str) -> Result<Illumination, String> {
    let v: Vec<f64> = s
        .split(',')
        .map(|t| t.trim().parse::<f64>())
        .collect::<Result<_, _>>()
        .map_err(|_| format!("'{s}': expected TX,TY in degrees"))?;
    if v.len() != 2 || v.iter().any(|t| !t.is_finite() || t.abs() >= 90.0) {
        return Err(format!(
            "'{s}': expected TX,TY in degrees, each between -90 and 90"
        ));
    }
    Ok(Illumination::Plane([v[0].to_radians(), v[1].to_radians()]))
}

fn parse_png_bits(s: &str) -> Result<u8, String> {
    match s.trim() {
        "8" => Ok(8),
        "16" => Ok(16),
        _ => Err(format!("'{s}': expected 8 or 16")),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn reconstruct(args: &[&str]) -> Result<Command, clap::Error> {
        let mut all = vec!["fringemill", "reconstruct", "p.tif"];
        all.extend_from_slice(args);
        Cli::try_parse_from(all).map(|c| c.command)
    }

    #[test]
    fn threads_must_be_positive() {
        assert!(Cli::try_parse_from(["fringemill", "plan", "j.toml", "--threads", "0"]).is_err());
        assert!(Cli::try_parse_from(["fringemill", "plan", "j.toml", "--threads", "x"]).is_err());
        let e = Cli::try_parse_from(["fringemill", "plan", "j.toml", "--threads", "100000"])
            .unwrap_err()
            .to_string();
        assert!(e.contains("at most"), "{e}");
        let c = Cli::try_parse_from(["fringemill", "plan", "j.toml", "--threads", "3"]).unwrap();
        assert_eq!(c.common.threads, Some(3));
    }

    #[test]
    fn shard_and_checkpoint_are_typed() {
        let c = Cli::try_parse_from([
            "fringemill",
            "run",
            "j.toml",
            "--shard",
            "2/4",
            "--checkpoint-secs",
            "1.5",
        ])
        .unwrap();
        match c.command {
            Command::Run {
                shard,
                checkpoint_secs,
                ..
            } => {
                assert_eq!(shard, Some(Shard { index: 1, count: 4 }));
                assert_eq!(checkpoint_secs, std::time::Duration::from_millis(1500));
            }
            _ => panic!("wrong command"),
        }
        for bad in [["--shard", "5/4"], ["--checkpoint-secs", "-1"]] {
            let mut a = vec!["fringemill", "run", "j.toml"];
            a.extend_from_slice(&bad);
            let e = Cli::try_parse_from(a).unwrap_err().to_string();
            assert!(e.contains(bad[0]), "{e}");
        }
    }

    #[test]
    fn distances_and_focal() {
        match reconstruct(&["--distance-mm", "4:6:1"]).unwrap() {
            Command::Reconstruct(ReconstructArgs { distance_mm, .. }) => {
                let d = distance_mm.unwrap().0;
                assert_eq!(d.len(), 3);
                assert!((d[0] - 4e-3).abs() < 1e-15 && (d[2] - 6e-3).abs() < 1e-15);
            }
            _ => panic!(),
        }
        match reconstruct(&["--focal-mm", "200"]).unwrap() {
            Command::Reconstruct(ReconstructArgs { focal_mm, .. }) => {
                assert_eq!(focal_mm, Some(0.2))
            }
            _ => panic!(),
        }
        assert!(reconstruct(&["--focal-mm", "-3"]).is_err());
        assert!(reconstruct(&["--distance-mm", "x"]).is_err());
        // One of the two is needed, not both.
        assert!(reconstruct(&[]).is_err());
        assert!(reconstruct(&["--distance-mm", "5", "--focal-mm", "200"]).is_err());
    }

    #[test]
    fn window_region_illumination_scale_bits_oversample() {
        match reconstruct(&[
            "--distance-mm",
            "5",
            "--window",
            "1,2,30,40",
            "--region",
            "0,0,8,9",
            "--illumination",
            "-3,-4",
            "--scale",
            "log",
            "--bits",
            "16",
        ])
        .unwrap()
        {
            Command::Reconstruct(ReconstructArgs {
                window,
                region,
                illumination,
                scale,
                bits,
                oversample,
                ..
            }) => {
                assert_eq!(
                    window,
                    Some(Window {
                        x: 1,
                        y: 2,
                        w: 30,
                        h: 40
                    })
                );
                assert_eq!(region.map(|r| (r.w, r.h)), Some((8, 9)));
                assert_eq!(
                    illumination,
                    Some(Illumination::Plane([
                        (-3f64).to_radians(),
                        (-4f64).to_radians()
                    ]))
                );
                assert_eq!(scale, ToneScale::Log);
                assert_eq!(bits, 16);
                assert_eq!(oversample, None);
            }
            _ => panic!(),
        }
        for bad in [
            ["--illumination", "95,0"],
            ["--illumination", "1"],
            ["--focal-mm", "-200"],
            ["--bits", "12"],
            ["--scale", "cubic"],
            ["--window", "1,2,3"],
            ["--oversample", "9"],
        ] {
            let mut a = vec!["--distance-mm", "5"];
            a.extend_from_slice(&bad);
            assert!(reconstruct(&a).is_err(), "{bad:?} accepted");
        }
        match reconstruct(&["--focal-mm", "100", "--oversample", "2"]).unwrap() {
            Command::Reconstruct(ReconstructArgs { oversample, .. }) => {
                assert_eq!(oversample, Some(2))
            }
            _ => panic!(),
        }
    }

    #[test]
    fn parses_run_with_several_jobs_and_threads() {
        let c = Cli::try_parse_from([
            "fringemill",
            "run",
            "a.toml",
            "b.toml",
            "--threads",
            "2",
            "-q",
        ])
        .unwrap();
        assert!(c.common.quiet);
        assert_eq!(c.common.threads, Some(2));
        match c.command {
            Command::Run { jobs, .. } => assert_eq!(jobs.len(), 2),
            _ => panic!("wrong command"),
        }
    }

    #[test]
    fn run_needs_a_job() {
        assert!(Cli::try_parse_from(["fringemill", "run"]).is_err());
    }

    #[test]
    fn fill_factor_and_default_image_name() {
        match reconstruct(&["--distance-mm", "5", "--fill-factor", "0.93"]).unwrap() {
            Command::Reconstruct(a) => {
                assert_eq!(a.fill_factor, Some(0.93));
                let req = a.into_request();
                assert_eq!(req.out, PathBuf::from("p-replay.png"));
                assert!(req.verify);
            }
            _ => panic!(),
        }
        for bad in ["0", "1.5", "x"] {
            let e = reconstruct(&["--distance-mm", "5", "--fill-factor", bad]).unwrap_err();
            assert!(e.to_string().contains("--fill-factor"), "{e}");
        }
    }
}
