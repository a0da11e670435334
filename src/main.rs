//! The `fringemill` binary: parses the command line and hands over to the library.
//! Exit codes: 0 success, 1 a job failed, 2 usage error.

mod cli;

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use clap::Parser;
use fringemill::job::{self, JobSpec, ProgressMode, RunOptions};

fn job_files(args: &[PathBuf]) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for a in args {
        if a.is_dir() {
            let mut found: Vec<PathBuf> = std::fs::read_dir(a)
                .map(|rd| rd.filter_map(|e| e.ok().map(|e| e.path())).filter(|p| p.extension().is_some_and(|x| x == "toml")).collect())
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
        return Err(fringemill::Error::input(path, "folder holds no .toml job file"));
    }
    let spec = JobSpec::load(path)?;
    job::run_job(&spec, opts)
}

fn main() -> ExitCode {
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
        if let Err(e) = rayon::ThreadPoolBuilder::new().num_threads(n).build_global() {
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
    match cli.command {
        cli::Command::Run { jobs } => {
            let files = job_files(&jobs);
            let opts = RunOptions { progress };
            let mut failed = 0usize;
            for f in &files {
                let t0 = std::time::Instant::now();
                match run_one(f, &opts) {
                    Ok(s) => {
                        if cli.common.stats {
                            let el = t0.elapsed().as_secs_f64();
                            let peak = job::progress::peak_rss_bytes().map(|b| format!("{:.1} MiB", b as f64 / 1048576.0)).unwrap_or_else(|| "unknown".into());
                            eprintln!(
                                "fringemill: stats: {}: {:.3} s, {} point-pixel updates, {:.3} G updates/s, peak memory {}",
                                f.display(),
                                el,
                                s.updates,
                                s.updates as f64 / el / 1e9,
                                peak
                            );
                        }
                        if !cli.common.quiet {
                            eprintln!("fringemill: {}: wrote {} and {} ({} emitters, {} point-pixel updates)", f.display(), s.tiff.display(), s.sidecar.display(), s.emitters, s.updates);
                        }
                        println!("{}", s.tiff.display());
                    }
                    Err(e) => {
                        failed += 1;
                        eprintln!("fringemill: error: {e}");
                    }
                }
            }
            if files.len() > 1 {
                eprintln!("fringemill: {} job(s): {} succeeded, {} failed", files.len(), files.len() - failed, failed);
            }
            if failed > 0 {
                ExitCode::from(1)
            } else {
                ExitCode::SUCCESS
            }
        }
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
