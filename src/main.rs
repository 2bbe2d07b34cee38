//! Command line: `tailtally` (or `tailtally serve`) serves the API; `tailtally openapi` prints its document;
//! `tailtally eval [FILE]` answers a batch of NDJSON request lines (the format of POST /v1/batch) offline.

use clap::Parser;
use tailtally::config::{Cli, Command};
use tailtally::{server, telemetry};

/// How long the runtime waits, once the server has stopped, for computations still running on the blocking
/// pool (they have been told to stop, and check between units of work); the process then exits regardless.
const BLOCKING_WAIT: std::time::Duration = std::time::Duration::from_secs(1);

fn main() -> std::process::ExitCode {
    let rt = match tokio::runtime::Builder::new_multi_thread().enable_all().build() {
        Ok(rt) => rt,
        Err(e) => {
            eprintln!("tailtally: cannot start the runtime: {e}");
            return std::process::ExitCode::FAILURE;
        }
    };
    let code = rt.block_on(run());
    // Dropping the runtime would wait for every blocking task; a computation that is slow to see its
    // cancellation flag must not hold the process past its shutdown grace.
    rt.shutdown_timeout(BLOCKING_WAIT);
    code
}

async fn run() -> std::process::ExitCode {
    let cli = Cli::parse();
    match cli.command.unwrap_or(Command::Serve) {
        Command::Openapi => write_document(tailtally::api::openapi::pretty_json().as_bytes()),
        Command::Eval { file } => eval(file, &cli.options).await,
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

/// `tailtally openapi`: the document to standard output. A reader that leaves early (`tailtally openapi | head`)
/// wants no more of it, so a broken pipe ends the command quietly with exit 0 (`print!` would panic there);
/// any other write failure is reported, exit 1.
fn write_document(doc: &[u8]) -> std::process::ExitCode {
    use std::io::Write;
    let mut out = std::io::stdout().lock();
    match out.write_all(doc).and_then(|()| out.flush()) {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(e) if e.kind() == std::io::ErrorKind::BrokenPipe => std::process::ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("tailtally: cannot write the document: {e}");
            std::process::ExitCode::FAILURE
        }
    }
}

/// `tailtally eval`: the batch's answers to standard output, in input order, through the same line handling
/// as POST /v1/batch. Problem lines are answers (exit 0); only failing to read the input or to write the
/// output is an error (exit 1).
async fn eval(file: Option<std::path::PathBuf>, opts: &tailtally::config::Options) -> std::process::ExitCode {
    use futures_util::StreamExt;
    use std::io::{Read, Write};
    let input: Box<dyn Read + Send> = match file.as_deref() {
        None => Box::new(std::io::stdin()),
        Some(p) if p == std::path::Path::new("-") => Box::new(std::io::stdin()),
        Some(p) => match std::fs::File::open(p) {
            Ok(f) => Box::new(f),
            Err(e) => {
                eprintln!("tailtally: cannot open {}: {e}", p.display());
                return std::process::ExitCode::FAILURE;
            }
        },
    };
    // The input is read on its own thread, a few chunks ahead of the computation and no more.
    let (tx, rx) = tokio::sync::mpsc::channel::<std::io::Result<bytes::Bytes>>(4);
    std::thread::spawn(move || {
        let mut input = input;
        loop {
            let mut buf = vec![0u8; 64 * 1024];
            let chunk = match input.read(&mut buf) {
                Ok(0) => return,
                Ok(n) => {
                    buf.truncate(n);
                    Ok(bytes::Bytes::from(buf))
                }
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => continue,
                Err(e) => Err(e),
            };
            let failed = chunk.is_err();
            if tx.blocking_send(chunk).is_err() || failed {
                return;
            }
        }
    });
    let chunks = futures_util::stream::unfold(rx, |mut rx| async move { rx.recv().await.map(|c| (c, rx)) });
    let limits = std::sync::Arc::new(tailtally::config::ServiceLimits::from_options(opts));
    // A pipe or a terminal may pause for as long as it likes: no idle limit offline.
    let batch = tailtally::config::BatchLimits {
        read_idle_timeout: None,
        ..tailtally::config::BatchLimits::from_options(opts)
    };
    let answers = tailtally::api::batch::answers(Box::pin(chunks), limits, batch);
    futures_util::pin_mut!(answers);
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    let mut status = std::process::ExitCode::SUCCESS;
    while let Some(a) = answers.next().await {
        // Each answer is flushed at once, so that a consumer of a pipe sees it as soon as it is ready.
        if let Err(e) = out.write_all(&a.line).and_then(|()| out.flush()) {
            eprintln!("tailtally: cannot write the answers: {e}");
            return std::process::ExitCode::FAILURE;
        }
        if let Some(e) = a.read_error {
            eprintln!("tailtally: cannot read the batch: {e}");
            status = std::process::ExitCode::FAILURE;
        }
    }
    status
}
