//! The `tamis` command: a thin layer over the library; see `tamis --help`.

mod cmd;

use std::process::ExitCode;

use clap::Parser;

fn main() -> ExitCode {
    let cli = cmd::Cli::parse();
    match cmd::run(cli) {
        Ok(code) => code,
        Err(e) => {
            // Output piped into `head` and closed early: quiet success.
            if e.chain().any(|c| {
                c.downcast_ref::<std::io::Error>()
                    .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
            }) {
                return ExitCode::SUCCESS;
            }
            eprintln!("error: {e:#}");
            ExitCode::from(1)
        }
    }
}
