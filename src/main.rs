//! The `burlwatch` binary: parses the command line and hands over to the
//! command implementations in `cli`. Everything that computes lives in the
//! library.

mod cli;

use clap::Parser;

fn main() {
    let args = cli::Args::parse();
    match cli::run(args) {
        Ok(code) => std::process::exit(code),
        Err(e) => {
            eprintln!("burlwatch: error: {e:#}");
            std::process::exit(1);
        }
    }
}
