//! Command line: `tailtally` (or `tailtally serve`) serves the API; `tailtally openapi` prints its document.

use clap::Parser;
use tailtally::config::{Cli, Command};
use tailtally::{server, telemetry};

#[tokio::main]
async fn main() -> std::process::ExitCode {
    let cli = Cli::parse();
    match cli.command.unwrap_or(Command::Serve) {
        Command::Openapi => {
            print!("{}", tailtally::api::openapi::pretty_json());
            std::process::ExitCode::SUCCESS
        }
        Command::Serve => {
            telemetry::init(cli.options.log_format);
            let app = match server::App::bind(&cli.options).await {
                Ok(a) => a,
                Err(e) => {
                    eprintln!("tailtally: cannot listen on {}: {e}", cli.options.listen);
                    return std::process::ExitCode::from(2);
                }
            };
            tracing::info!(addr = %app.local_addr(), "tailtally listening on http://{}", app.local_addr());
            match app.serve(server::shutdown_signal()).await {
                Ok(()) => {
                    tracing::info!("stopped");
                    std::process::ExitCode::SUCCESS
                }
                Err(e) => {
                    eprintln!("tailtally: server error: {e}");
                    std::process::ExitCode::FAILURE
                }
            }
        }
    }
}
