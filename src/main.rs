//! The `fringemill` binary: parses the command line and hands over to the library.
//! Exit codes: 0 success, 1 a job failed, 2 usage error, 130 interrupted (work saved to continue).

mod cli;

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use clap::Parser;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use fringemill::job::{self, JobSpec, ProgressMode, RunOptions, Shard};
use fringemill::replay;

fn job_files(args: &[PathBuf]) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for a in args {
        if a.is_dir() {
            let mut found: Vec<PathBuf> = std::fs::read_dir(a)
                .map(|rd| {
                    rd.filter_map(|e| e.ok().map(|e| e.path()))
                        .filter(|p| p.extension().is_some_and(|x| x == "toml"))
                        .collect()
                })
                .unwrap_or_default();
            found.sort();
            if found.is_empty() {
                // Reported as a failing job below.
                out.push(a.clone());
            }
            out.extend(found);
        } else {
            out.push(a.clone());
        }
    }
    out
}

fn run_one(path: &Path, opts: &RunOptions) -> fringemill::Result<job::RunSummary> {
    if path.is_dir() {
        return Err(fringemill::Error::input(
            path,
            "folder holds no .toml job file",
        ));
    }
    let spec = JobSpec::load(path)?;
    job::run_job(&spec, opts)
}

fn main() -> ExitCode {
    let t_start = std::time::Instant::now();
    let cli = match cli::Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() { 2 } else { 0 };
            let _ = e.print();
            return ExitCode::from(code);
        }
    };
    if let Some(n) = cli.common.threads {
        if n == 0 {
            eprintln!("fringemill: error: --threads must be at least 1");
            return ExitCode::from(2);
        }
        if let Err(e) = rayon::ThreadPoolBuilder::new()
            .num_threads(n)
            .build_global()
        {
            eprintln!("fringemill: error: thread pool: {e}");
            return ExitCode::from(2);
        }
    }
    let progress = if cli.common.quiet {
        ProgressMode::Quiet
    } else if cli.common.log_progress {
        ProgressMode::Log
    } else {
        ProgressMode::Auto
    };
    let stop = Arc::new(AtomicBool::new(false));
    {
        let stop = stop.clone();
        // First Ctrl-C / SIGTERM: finish the band in flight and checkpoint; a second one ends at once.
        let _ = ctrlc::set_handler(move || {
            if stop.swap(true, Ordering::SeqCst) {
                std::process::exit(130);
            }
            eprintln!(
                "fringemill: stopping after the band in flight (Ctrl-C again to quit at once)"
            );
        });
    }
    match cli.command {
        cli::Command::Run {
            jobs,
            restart,
            shard,
            checkpoint_secs,
        } => {
            let shard = match shard.as_deref().map(Shard::parse).transpose() {
                Ok(s) => s,
                Err(e) => {
                    eprintln!("fringemill: error: {e}");
                    return ExitCode::from(2);
                }
            };
            if !(checkpoint_secs >= 0.0 && checkpoint_secs.is_finite()) {
                eprintln!("fringemill: error: --checkpoint-secs must be >= 0");
                return ExitCode::from(2);
            }
            let files = job_files(&jobs);
            let mut opts = RunOptions::new(progress);
            opts.restart = restart;
            opts.shard = shard;
            opts.checkpoint_every = Duration::from_secs_f64(checkpoint_secs);
            opts.stop = stop.clone();
            let mut failed = 0usize;
            let mut interrupted = false;
            for f in &files {
                if stop.load(Ordering::SeqCst) {
                    break;
                }
                let t0 = std::time::Instant::now();
                let res = run_one(f, &opts);
                report(f, res, &cli.common, t0, &mut failed, &mut interrupted);
            }
            if files.len() > 1 {
                eprintln!(
                    "fringemill: {} job(s): {} succeeded, {} failed",
                    files.len(),
                    files.len() - failed,
                    failed
                );
            }
            if interrupted {
                ExitCode::from(130)
            } else if failed > 0 {
                ExitCode::from(1)
            } else {
                ExitCode::SUCCESS
            }
        }
        cli::Command::Assemble { job } => {
            let mut opts = RunOptions::new(progress);
            opts.stop = stop;
            let t0 = std::time::Instant::now();
            let res = JobSpec::load(&job).and_then(|s| job::assemble(&s, &opts));
            let (mut failed, mut interrupted) = (0, false);
            report(&job, res, &cli.common, t0, &mut failed, &mut interrupted);
            if failed > 0 {
                ExitCode::from(1)
            } else {
                ExitCode::SUCCESS
            }
        }
        cli::Command::Reconstruct {
            plate,
            distance_mm,
            focal_mm,
            window,
            illumination,
            out,
            scale,
            bits,
            region,
            target,
            peaks,
            oversample,
        } => {
            match reconstruct_request(
                plate,
                distance_mm.as_deref(),
                focal_mm,
                window,
                illumination,
                out,
                &scale,
                bits,
                region,
                target,
                peaks,
                oversample,
            ) {
                Err(m) => {
                    eprintln!("fringemill: error: {m}");
                    ExitCode::from(2)
                }
                Ok(req) => match replay::reconstruct(&req) {
                    Ok(files) => {
                        if cli.common.stats {
                            let peak = job::progress::peak_rss_bytes()
                                .map(|b| format!("{:.1} MiB", b as f64 / 1048576.0))
                                .unwrap_or_else(|| "unknown".into());
                            eprintln!(
                                "fringemill: stats: reconstruct {}: {:.3} s, {} file(s) written, peak memory {peak}",
                                req.tif.display(),
                                t_start.elapsed().as_secs_f64(),
                                files.len()
                            );
                        }
                        for f in files {
                            println!("{}", f.display());
                        }
                        ExitCode::SUCCESS
                    }
                    Err(e) => {
                        eprintln!("fringemill: error: {e}");
                        ExitCode::from(1)
                    }
                },
            }
        }
        cli::Command::Sample { job, out } => match JobSpec::load(&job)
            .and_then(|s| job::scene::build_scene(&s))
            .and_then(|sc| job::scene::write_emitters_ply(&out, &sc).map(|_| sc.normals.len()))
        {
            Ok(n) => {
                eprintln!("fringemill: wrote {n} emitters to {}", out.display());
                println!("{}", out.display());
                ExitCode::SUCCESS
            }
            Err(e) => {
                eprintln!("fringemill: error: {e}");
                ExitCode::from(1)
            }
        },
        cli::Command::Plan { job } => match JobSpec::load(&job).and_then(|s| job::plan(&s)) {
            Ok(r) => {
                for l in r.lines {
                    println!("{l}");
                }
                ExitCode::SUCCESS
            }
            Err(e) => {
                eprintln!("fringemill: error: {e}");
                ExitCode::from(1)
            }
        },
    }
}

#[allow(clippy::too_many_arguments)]
fn reconstruct_request(
    plate: PathBuf,
    distance_mm: Option<&str>,
    focal_mm: Option<f64>,
    window: Option<String>,
    illumination: Option<String>,
    out: Option<PathBuf>,
    scale: &str,
    bits: u8,
    region: Option<String>,
    target: Option<PathBuf>,
    peaks: usize,
    oversample: Option<usize>,
) -> Result<replay::ReconstructRequest, String> {
    let distances = match distance_mm {
        Some(d) => replay::parse_distances_mm(d).map_err(|m| format!("--distance-mm {m}"))?,
        None => Vec::new(),
    };
    let focal = match focal_mm {
        Some(f) if f.is_finite() && f > 0.0 => Some(f * 1e-3),
        Some(f) => return Err(format!("--focal-mm {f}: must be > 0")),
        None => None,
    };
    let window = window
        .as_deref()
        .map(replay::Window::parse)
        .transpose()
        .map_err(|m| format!("--window {m}"))?;
    let illumination = match illumination {
        None => replay::Illumination::Recorded,
        Some(s) => {
            let v: Vec<f64> = s
                .split(',')
                .map(|t| t.trim().parse::<f64>())
                .collect::<Result<_, _>>()
                .map_err(|_| format!("--illumination '{s}': expected TX,TY in degrees"))?;
            if v.len() != 2 || v.iter().any(|t| !t.is_finite() || t.abs() >= 90.0) {
                return Err(format!(
                    "--illumination '{s}': expected TX,TY in degrees, each between -90 and 90"
                ));
            }
            replay::Illumination::Plane([v[0].to_radians(), v[1].to_radians()])
        }
    };
    let region = match region {
        None => None,
        Some(s) => {
            let w = replay::Window::parse(&s).map_err(|m| format!("--region {m}"))?;
            Some([w.x as usize, w.y as usize, w.w as usize, w.h as usize])
        }
    };
    if bits != 8 && bits != 16 {
        return Err(format!("--bits {bits}: expected 8 or 16"));
    }
    let scale = replay::metrics::ToneScale::parse(scale).map_err(|m| format!("--scale {m}"))?;
    let out = out.unwrap_or_else(|| {
        let stem = plate
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_else(|| "plate".into());
        plate.with_file_name(format!("{stem}-replay.png"))
    });
    Ok(replay::ReconstructRequest {
        tif: plate,
        distances,
        focal,
        window,
        illumination,
        out,
        scale,
        bits,
        region,
        target,
        peaks,
        oversample,
    })
}

fn report(
    f: &Path,
    res: fringemill::Result<job::RunSummary>,
    common: &cli::Common,
    t0: std::time::Instant,
    failed: &mut usize,
    interrupted: &mut bool,
) {
    match res {
        Ok(s) => {
            if common.stats {
                let el = t0.elapsed().as_secs_f64();
                let peak = job::progress::peak_rss_bytes()
                    .map(|b| format!("{:.1} MiB", b as f64 / 1048576.0))
                    .unwrap_or_else(|| "unknown".into());
                eprintln!(
                    "fringemill: stats: {}: {:.3} s, {} point-pixel updates, {:.3} G updates/s, peak memory {}",
                    f.display(),
                    el,
                    s.updates,
                    s.updates as f64 / el / 1e9,
                    peak
                );
            }
            if !common.quiet {
                eprintln!(
                    "fringemill: {}: wrote {} and {} ({} emitters, {} point-pixel updates)",
                    f.display(),
                    s.tiff.display(),
                    s.sidecar.display(),
                    s.emitters,
                    s.updates
                );
            }
            println!("{}", s.tiff.display());
        }
        Err(e) => {
            if matches!(e, fringemill::Error::Interrupted(_)) {
                *interrupted = true;
            }
            *failed += 1;
            eprintln!("fringemill: error: {e}");
        }
    }
}
