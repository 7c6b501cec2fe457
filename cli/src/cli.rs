//! What the user typed: the command line, before anything is validated.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};
use deeptime_coordinator::args::{CoordinatorArgs, RunArgs, StatusArgs, TlsArgs};

#[derive(Parser, Debug)]
#[command(
    name = "deeptime",
    version,
    about = "Advance Life-like cellular automata to astronomically far generations",
    long_about = "Advance two-state Life-like cellular automata (B/S rules) with the HashLife \
                  method: canonical quadtrees, memoised results, jumps of 2^k generations."
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Advance a pattern by any number of generations and report the result
    Leap(LeapArgs),
    /// Run a job file to its target, writing checkpoints; resume after a crash
    Run(RunArgs),
    /// List the checkpoints stored in a run's folder
    Checkpoints(DirArgs),
    /// Read every checkpoint of a run back whole; exit non-zero naming damage
    Verify(DirArgs),
    /// The state at any generation of a stored run: figures, RLE or a picture
    Snapshot(SnapshotArgs),
    /// Delete all but the newest checkpoints, and the packs only they needed
    Prune(PruneArgs),
    /// Run the speed and memory suite; print a table, optionally write JSON
    Bench(BenchArgs),
    /// Run a job on a cluster: wait for nodes, shard the tree, print the figures
    Coordinator(CoordinatorArgs),
    /// Serve as a cluster node: join a coordinator, compute and keep quads
    Node(NodeArgs),
    /// Show a running cluster job's live status
    Status(StatusArgs),
    /// Tell what a pattern becomes: when it settles, its period, its census
    Fate(FateArgs),
    /// A pattern's population, bounding box and digest every K generations
    Timeline(TimelineArgs),
}

#[derive(Args, Debug)]
pub struct NodeArgs {
    /// The coordinator's URL (http://HOST:PORT, or https:// with TLS)
    #[arg(long)]
    pub join: String,

    /// Address to listen on for the coordinator and peers (e.g. 0.0.0.0:7200)
    #[arg(long)]
    pub listen: std::net::SocketAddr,

    /// The URL others reach this node at [default: http://<bound address>]
    #[arg(long)]
    pub advertise: Option<String>,

    /// Memory budget for this node's quads, e.g. 8GiB [default: half of RAM]
    #[arg(long)]
    pub memory: Option<String>,

    /// Tasks this node runs at once: N slots, each a member of the cluster
    /// with a store of its own and 1/N of --memory, on N ports from
    /// --listen's (and --advertise's)
    #[arg(long, value_name = "N", default_value_t = 1, value_parser = clap::builder::RangedU64ValueParser::<usize>::new().range(1..=1024))]
    pub slots: usize,

    /// The cluster token file (one line), the coordinator's
    #[arg(long)]
    pub token_file: PathBuf,

    /// The jobs' checkpoint folder (a path or s3:// URL, the same storage
    /// the coordinator's job names): the node writes its pieces' packs there
    /// itself [default: the coordinator writes them]
    #[arg(long)]
    pub checkpoint_dir: Option<PathBuf>,

    /// When its memory is full, the node writes the pieces it has held
    /// longest to --checkpoint-dir and reads them back when needed: at
    /// most this many bytes at once (0: never; the run then stops when a
    /// node is full) [default: no limit]
    #[arg(long, value_name = "SIZE")]
    pub spill_limit: Option<String>,

    #[command(flatten)]
    pub tls: TlsArgs,
}

#[derive(Args, Debug)]
pub struct DirArgs {
    /// A run's checkpoint folder (the job's checkpoint.dir)
    pub dir: PathBuf,

    /// Print JSON instead of a table
    #[arg(long)]
    pub json: bool,
}

#[derive(Args, Debug)]
pub struct LeapArgs {
    /// Pattern file, RLE or plaintext (recognised by content); `-` reads standard input
    pub pattern: PathBuf,

    /// Generations to advance: a decimal integer, B^E or M*B^E (e.g. 1103, 2^40, 30*10^100)
    #[arg(long, value_name = "N", allow_hyphen_values = true)]
    pub gens: String,

    /// Rule in B/S notation (B3/S23, or the older 23/3); overrides the pattern's header
    #[arg(long, value_name = "RULE")]
    pub rule: Option<String>,

    /// Print exactly one JSON object on standard output
    #[arg(long)]
    pub json: bool,

    /// Write the final pattern as RLE (.rle, positioned at its bounding box) or a picture (.png)
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,

    /// For pictures: each pixel is 2^SCALE × 2^SCALE cells (default: fit 1024 pixels)
    #[arg(long, value_name = "SCALE")]
    pub scale: Option<u32>,

    /// For pictures: log, any or share (see snapshot --shade)
    #[arg(long, value_name = "MODE", default_value = "log")]
    pub shade: String,

    /// Also report this rectangle's population and bounding box: LEFT,TOP,WIDTH,HEIGHT
    #[arg(long, value_name = "L,T,W,H", allow_hyphen_values = true)]
    pub region: Option<String>,

    /// Memory budget for quads, e.g. 2GiB or 512MiB (default: half of this machine's memory)
    #[arg(long, value_name = "SIZE")]
    pub memory: Option<String>,

    #[command(flatten)]
    pub universe: UniverseArg,
}

/// `--universe`, for the commands that advance a pattern.
#[derive(Args, Debug)]
pub struct UniverseArg {
    /// Where the pattern lives: plane (unbounded, the default), "torus WxH"
    /// (edges wrap) or "bounded WxH" (cells outside stay dead), with the
    /// universe's top-left cell at the pattern's (0, 0)
    #[arg(long = "universe", value_name = "UNIVERSE")]
    pub text: Option<String>,
}

impl UniverseArg {
    /// The universe the option names.
    pub fn space(&self) -> Result<deeptime_engine::finite::Space, deeptime_engine::BadInput> {
        deeptime_coordinator::input::space(self.text.as_deref(), "--universe")
    }
}

#[derive(Args, Debug)]
pub struct FateArgs {
    /// Pattern file, RLE or plaintext (recognised by content); `-` reads standard input
    pub pattern: PathBuf,

    /// Rule in B/S notation (B3/S23, or the older 23/3); overrides the pattern's header
    #[arg(long, value_name = "RULE")]
    pub rule: Option<String>,

    /// Look no further than this generation, as for --gens [default: 2^20]
    #[arg(long, value_name = "N", allow_hyphen_values = true)]
    pub limit: Option<String>,

    /// Print exactly one JSON object on standard output
    #[arg(long)]
    pub json: bool,

    /// Memory budget for quads, e.g. 2GiB or 512MiB (default: half of this machine's memory)
    #[arg(long, value_name = "SIZE")]
    pub memory: Option<String>,

    #[command(flatten)]
    pub universe: UniverseArg,
}

#[derive(Args, Debug)]
pub struct TimelineArgs {
    /// Pattern file (RLE or plaintext; `-` reads standard input), or a run's
    /// checkpoint folder or s3:// URL, whose stored generations are listed
    pub pattern: PathBuf,

    /// The last generation sampled, as for leap (e.g. 3000, 10^100); for a pattern
    #[arg(long, value_name = "N", allow_hyphen_values = true)]
    pub gens: Option<String>,

    /// Sample every K generations, as for --gens (e.g. 30, 10^97); for a pattern
    #[arg(long, value_name = "K", allow_hyphen_values = true)]
    pub every: Option<String>,

    /// Rule in B/S notation; overrides the pattern's header
    #[arg(long, value_name = "RULE")]
    pub rule: Option<String>,

    /// Write the samples as CSV (generation,population,left,top,width,height,digest)
    #[arg(long, value_name = "FILE.csv")]
    pub csv: Option<PathBuf>,

    /// Draw the population by generation as a PNG plot
    #[arg(long, value_name = "FILE.png")]
    pub png: Option<PathBuf>,

    /// Print exactly one JSON object on standard output
    #[arg(long)]
    pub json: bool,

    /// Memory budget for quads, e.g. 2GiB or 512MiB (default: half of this machine's memory)
    #[arg(long, value_name = "SIZE")]
    pub memory: Option<String>,

    #[command(flatten)]
    pub universe: UniverseArg,
}

#[derive(Args, Debug)]
pub struct BenchArgs {
    /// Small sizes for a smoke run (seconds, not minutes); figures are not comparable
    #[arg(long)]
    pub quick: bool,

    /// Write the figures and the machine's description to this JSON file
    #[arg(long, value_name = "FILE")]
    pub json: Option<PathBuf>,

    /// Python with numpy and scipy, for the numpy comparison (default: $DEEPTIME_PYTHON)
    #[arg(long, value_name = "PATH")]
    pub python: Option<PathBuf>,

    /// Run one part only: reach, stepping, chaotic, rules, numpy, checkpoints, cluster, capacity or fate
    #[arg(long, value_name = "PART")]
    pub only: Option<String>,
}

#[derive(Args, Debug)]
pub struct SnapshotArgs {
    /// A run's checkpoint folder (the job's checkpoint.dir)
    pub dir: PathBuf,

    /// The generation: stored, or reached from the nearest earlier checkpoint
    #[arg(long = "gen", value_name = "G", allow_hyphen_values = true)]
    pub generation: String,

    /// Only this rectangle of cells: LEFT,TOP,WIDTH,HEIGHT (default: the bounding box)
    #[arg(long, value_name = "L,T,W,H", allow_hyphen_values = true)]
    pub region: Option<String>,

    /// Write the state (or the region) as RLE (.rle) or as a picture (.png)
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,

    /// For pictures: each pixel is 2^SCALE × 2^SCALE cells (default: fit 1024 pixels)
    #[arg(long, value_name = "SCALE")]
    pub scale: Option<u32>,

    /// For pictures: log (grey by the log of the live cells, one cell mid-grey),
    /// any (black where any cell lives) or share (grey by the share of live cells)
    #[arg(long, value_name = "MODE", default_value = "log")]
    pub shade: String,

    /// Print exactly one JSON object on standard output
    #[arg(long)]
    pub json: bool,

    /// Memory budget for quads, as for leap
    #[arg(long, value_name = "SIZE")]
    pub memory: Option<String>,
}

#[derive(Args, Debug)]
pub struct PruneArgs {
    /// A run's checkpoint folder (the job's checkpoint.dir)
    pub dir: PathBuf,

    /// How many of the newest checkpoints to keep besides the first (at least 1)
    #[arg(long, value_name = "N")]
    pub keep: usize,
}
