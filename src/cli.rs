//! Command-line definition: one place per command and option, with its help text.
//! Parsing only; the work happens in the library (`job`).

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

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
    #[arg(long, global = true, value_name = "N")]
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
        #[arg(long, value_name = "K/N|slurm")]
        shard: Option<String>,
        /// Least seconds between two checkpoints of the journal (default 30).
        #[arg(long, value_name = "S", default_value_t = 30.0)]
        checkpoint_secs: f64,
    },
    /// Streams the finished shards' parts into the plate's TIFF and sidecar.
    Assemble {
        /// Job file.
        #[arg(value_name = "JOB")]
        job: PathBuf,
    },
    /// Replays a plate numerically: intensity images at chosen depths plus metrics (JSON).
    Reconstruct {
        /// The plate TIFF (its sidecar NAME.json must sit beside it).
        #[arg(value_name = "PLATE.tif")]
        plate: PathBuf,
        /// Depth in front of the plate, mm: D, or a stack A:B:STEP.
        #[arg(
            long,
            value_name = "D|A:B:STEP",
            required_unless_present = "focal_mm",
            conflicts_with = "focal_mm"
        )]
        distance_mm: Option<String>,
        /// Replay through a lens of this focal length (mm) onto its focal plane (Fourier geometry).
        #[arg(long, value_name = "F")]
        focal_mm: Option<f64>,
        /// Replay only this window of the plate: first column, first row, width, height (pixels).
        #[arg(long, value_name = "X,Y,W,H")]
        window: Option<String>,
        /// Light the plate with a plane wave at these tilts (degrees) instead of the recorded reference.
        #[arg(long, value_name = "TX,TY")]
        illumination: Option<String>,
        /// Output PNG (default: PLATE-replay.png); metrics go to the same name with .json.
        #[arg(long, value_name = "FILE")]
        out: Option<PathBuf>,
        /// Grey mapping: linear, gamma or log.
        #[arg(long, default_value = "gamma")]
        scale: String,
        /// PNG bits per sample: 8 or 16.
        #[arg(long, default_value_t = 8)]
        bits: u8,
        /// Region of the replay image for power fraction, uniformity, speckle contrast: X,Y,W,H pixels.
        #[arg(long, value_name = "X,Y,W,H")]
        region: Option<String>,
        /// Target image (PNG, same size as the replay) for correlation and RMSE.
        #[arg(long, value_name = "PNG")]
        target: Option<PathBuf>,
        /// Number of intensity peaks to report.
        #[arg(long, default_value_t = 10)]
        peaks: usize,
        /// Fourier replays: also replay K times finer (zero padding; K = 2..8), written as
        /// OUT-osK.png, with the target's flat top measured between the designed samples.
        #[arg(long, value_name = "K")]
        oversample: Option<usize>,
    },
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

#[cfg(test)]
mod tests {
    use super::*;

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
}
