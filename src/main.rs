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
            let broken = |k: Option<std::io::ErrorKind>| k == Some(std::io::ErrorKind::BrokenPipe);
            if e.chain().any(|c| {
                broken(c.downcast_ref::<std::io::Error>().map(|io| io.kind()))
                    || broken(
                        c.downcast_ref::<serde_json::Error>()
                            .and_then(|j| j.io_error_kind()),
                    )
            }) {
                return ExitCode::SUCCESS;
            }
            eprintln!("error: {e:#}");
            ExitCode::from(1)
        }
    }
}
