//! Jobs: the job file, running it end to end, planning it, and reporting progress.
//! This is the only module that connects scenes, synthesis, encoding and output.

pub mod estimate;
pub mod fields;
pub mod iterative;
pub mod journal;
pub mod progress;
pub mod record;
pub mod run;
pub mod scene;
pub mod spec;

pub use progress::ProgressMode;
pub use run::{assemble, build_emitters, plan, run_job, PlanReport, RunOptions, RunSummary, Shard};
pub use spec::JobSpec;
