//! Every command-line option of `sluice`, in one place.

use clap::{Args, Parser, Subcommand};
use std::path::PathBuf;

#[derive(Parser, Debug)]
#[command(
    name = "sluice",
    version,
    about = "Pathology extracts in, disclosure-controlled aggregates out"
)]
pub struct Cli {
    /// Folder holding the policy files (profiles/, analytes.toml, ...).
    #[arg(
        long,
        global = true,
        default_value = "policies",
        env = "SLUICE_POLICIES"
    )]
    pub policies: PathBuf,
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Generate synthetic monthly extracts of an invented region, with planted ground truth.
    Synth(SynthArgs),
    /// Run every stage on the shipped demo data into a fresh folder.
    Demo(DemoArgs),
    /// Make or inspect a pseudonymisation key.
    #[command(subcommand)]
    Key(KeyCommand),
    /// Link extract files into the pseudonymised store (incremental, idempotent).
    Link(LinkArgs),
    /// Run a study over the store: patient-level tables and aggregate candidates, inside the
    /// secure area.
    Measure(MeasureArgs),
    /// Put a study's aggregate candidates through disclosure control and write a release.
    Release(ReleaseArgs),
    /// List the releases recorded in a store's ledger, with the populations behind them.
    Ledger {
        /// The store (its ledger is `<store>-ledger/ledger.json`).
        #[arg(long)]
        store: PathBuf,
    },
    /// The IG officer's independent check of a release folder (exit 1 on any failure).
    Check {
        /// The release folder.
        release: PathBuf,
    },
    /// Record the IG officer's signed decision, bound to the exact bytes of the release.
    Approve(ApproveArgs),
    /// Reviewer signing keys.
    #[command(subcommand)]
    Reviewer(ReviewerCommand),
    /// Pool approved releases of the same study from several sites into one release.
    Pool(PoolArgs),
    /// Copy a checked and approved release out of the secure area.
    Export {
        /// The release folder.
        release: PathBuf,
        /// Destination folder (must not exist yet).
        #[arg(long)]
        to: PathBuf,
    },
}

#[derive(Args, Debug)]
pub struct ReleaseArgs {
    /// The work folder written by `sluice measure`.
    #[arg(long)]
    pub work: PathBuf,
    /// Disclosure rules: a path, or a name under <policies>/disclosure/.
    #[arg(long, default_value = "standard")]
    pub rules: String,
    /// The release folder to write (must not exist, or be empty).
    #[arg(long)]
    pub out: PathBuf,
    /// The release ledger (default: `<store>-ledger/ledger.json` beside the store measured).
    #[arg(long)]
    pub ledger: Option<PathBuf>,
    /// Who makes the release (recorded in the manifest; a site requiring two people refuses
    /// their approval of it). Default: the login name.
    #[arg(long, env = "USER")]
    pub analyst: Option<String>,
}

#[derive(Args, Debug)]
pub struct PoolArgs {
    /// Approved site releases (each must pass check and carry an approval of its exact bytes).
    #[arg(required = true, num_args = 2..)]
    pub releases: Vec<PathBuf>,
    /// Disclosure rules for the pooled release: a path, or a name under <policies>/disclosure/.
    #[arg(long, default_value = "standard")]
    pub rules: String,
    /// The pooled release folder to write.
    #[arg(long)]
    pub out: PathBuf,
}

#[derive(Args, Debug)]
pub struct ApproveArgs {
    /// The release folder.
    pub release: PathBuf,
    /// The reviewer's signing key (made by `sluice reviewer new`, registered in
    /// <policies>/disclosure/reviewers.toml); its name is recorded in the approval.
    #[arg(long)]
    pub key: PathBuf,
    #[arg(long, value_enum)]
    pub decision: DecisionArg,
    /// The reviewer's note (recorded in the approval).
    #[arg(long, default_value = "")]
    pub note: String,
}

#[derive(clap::ValueEnum, Clone, Copy, Debug)]
pub enum DecisionArg {
    Approved,
    Rejected,
}

#[derive(Args, Debug)]
pub struct MeasureArgs {
    /// Study policy: a path, or a name under <policies>/studies/.
    #[arg(long)]
    pub study: String,
    /// The store folder made by `sluice link`.
    #[arg(long)]
    pub store: PathBuf,
    /// Work folder inside the secure area (patient-level tables and candidates.json).
    #[arg(long)]
    pub work: PathBuf,
}

#[derive(Subcommand, Debug)]
pub enum KeyCommand {
    /// Make a new 256-bit key from the operating system's secure random source (file mode 0600).
    New {
        #[arg(long)]
        out: PathBuf,
        /// A label stored with the key (e.g. site and year).
        #[arg(long, default_value = "sluice")]
        label: String,
    },
    /// Print the key's public fingerprint (never the key).
    Fingerprint { file: PathBuf },
}

#[derive(Subcommand, Debug)]
pub enum ReviewerCommand {
    /// Make an Ed25519 signing key for an IG officer (file mode 0600) and print the line that
    /// registers its public half in <policies>/disclosure/reviewers.toml.
    New {
        /// The reviewer's name, as approvals will record it.
        #[arg(long)]
        name: String,
        #[arg(long)]
        out: PathBuf,
    },
}

#[derive(Args, Debug)]
pub struct LinkArgs {
    /// Site profile: a path, or a name under <policies>/profiles/.
    #[arg(long)]
    pub profile: String,
    /// The key file made by `sluice key new`.
    #[arg(long)]
    pub key: PathBuf,
    /// The store folder (created if missing).
    #[arg(long)]
    pub store: PathBuf,
    /// Where quarantined rows go, with their raw lines (default: <store>-quarantine).
    #[arg(long)]
    pub quarantine: Option<PathBuf>,
    /// Tag dictionary: a path, or a name under <policies>/tags/.
    #[arg(long, default_value = "dmard")]
    pub tags: String,
    /// Postcode centroid table (postcode,latitude,longitude) for home-to-GP distances.
    #[arg(long, requires = "practices")]
    pub postcodes: Option<PathBuf>,
    /// GP practice table (practice_code,latitude,longitude or practice_code,postcode).
    #[arg(long, requires = "postcodes")]
    pub practices: Option<PathBuf>,
    /// Keep the outward part of the home postcode (e.g. "QV9") as `home_area`.
    #[arg(long)]
    pub keep_area: bool,
    /// Extract files, linked in the order given.
    #[arg(required = true)]
    pub files: Vec<PathBuf>,
}

#[derive(Args, Debug, Clone)]
pub struct SynthArgs {
    /// Site profile to write the extracts in: a path, or a name under <policies>/profiles/.
    #[arg(long, default_value = "quillmere")]
    pub profile: String,
    /// Output folder (extracts/, reference/, truth/ are created inside).
    #[arg(long)]
    pub out: PathBuf,
    #[arg(long, default_value_t = 20_260_101)]
    pub seed: u64,
    #[arg(long, default_value_t = 160_000)]
    pub patients: u32,
    #[arg(long, default_value_t = 60)]
    pub months: u32,
    /// First month of the history (YYYY-MM).
    #[arg(long, default_value = "2021-01")]
    pub start: String,
    /// Testing-policy change date (YYYY-MM-DD); default: 12 months before the history ends.
    #[arg(long)]
    pub policy_change: Option<String>,
    /// Approximate number of result rows to write (scales the background request rate).
    #[arg(long)]
    pub rows: Option<u64>,
    /// Share of patients on methotrexate.
    #[arg(long, default_value_t = 0.04)]
    pub mtx_share: f64,
    /// Days of the previous month each monthly file repeats.
    #[arg(long, default_value_t = 3)]
    pub overlap_days: u32,
}

#[derive(Args, Debug)]
pub struct DemoArgs {
    /// The shipped demo data.
    #[arg(long, default_value = "demo-data")]
    pub data: PathBuf,
    /// Fresh output folder (must not exist, or be empty).
    #[arg(long, default_value = "out/demo")]
    pub out: PathBuf,
}
