//! `auspexd`: thin glue over `auspexd::cli`.

use clap::Parser;

#[derive(Parser)]
#[command(
    name = "auspexd",
    version,
    about = "Auspex daemon: live decoding of spike streams over ZeroMQ"
)]
struct Cli {
    #[command(flatten)]
    args: auspexd::cli::DaemonArgs,
}

fn main() {
    std::process::exit(auspexd::cli::run_cli(Cli::parse().args));
}
