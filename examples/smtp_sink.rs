//! A local SMTP sink for the soak bench (`benches/soak.sh`): accepts every message on
//! 127.0.0.1:PORT (plain SMTP, no TLS, no AUTH) and writes each one, as received, to its own
//! file in a folder, so that a script can count messages and their Message-IDs. Stopping the
//! process is how the bench takes the mail server down.
//!
//! ```sh
//! cargo run --release --example smtp_sink -- PORT FOLDER
//! ```
//!
//! A message's file is written under a temporary name and renamed once complete
//! (`<pid>-<n>.eml`), before the final reply is sent.

use std::io::Write;
use std::net::{IpAddr, TcpListener};
use std::path::PathBuf;
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};

use mailin_embedded::{Handler, Response, Server, response};

#[derive(Clone)]
struct Sink {
    folder: PathBuf,
    counter: Arc<AtomicU64>,
    data: Vec<u8>,
}

impl Sink {
    fn store(&mut self) -> std::io::Result<()> {
        let n = self.counter.fetch_add(1, Ordering::Relaxed);
        let name = format!("{}-{n}.eml", std::process::id());
        let tmp = self.folder.join(format!(".{name}.part"));
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(&self.data)?;
        f.sync_all()?;
        std::fs::rename(&tmp, self.folder.join(name))
    }
}

impl Handler for Sink {
    fn helo(&mut self, _ip: IpAddr, _domain: &str) -> Response {
        response::OK
    }

    fn data_start(&mut self, _domain: &str, _from: &str, _8bit: bool, _to: &[String]) -> Response {
        self.data.clear();
        response::OK
    }

    fn data(&mut self, buf: &[u8]) -> std::io::Result<()> {
        self.data.extend_from_slice(buf);
        Ok(())
    }

    fn data_end(&mut self) -> Response {
        match self.store() {
            Ok(()) => response::OK,
            Err(e) => {
                eprintln!("smtp_sink: cannot write a message: {e}");
                response::INTERNAL_ERROR
            }
        }
    }
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let (Some(port), Some(folder)) = (args.first(), args.get(1)) else {
        eprintln!("usage: smtp_sink PORT FOLDER");
        std::process::exit(2);
    };
    let port: u16 = port.parse().unwrap_or_else(|_| {
        eprintln!("smtp_sink: PORT must be a number (got {port:?})");
        std::process::exit(2);
    });
    let folder = PathBuf::from(folder);
    if let Err(e) = std::fs::create_dir_all(&folder) {
        eprintln!("smtp_sink: cannot create {}: {e}", folder.display());
        std::process::exit(1);
    }
    let listener = TcpListener::bind(("127.0.0.1", port)).unwrap_or_else(|e| {
        eprintln!("smtp_sink: cannot listen on 127.0.0.1:{port}: {e}");
        std::process::exit(1);
    });
    let sink = Sink {
        folder,
        counter: Arc::new(AtomicU64::new(0)),
        data: Vec::new(),
    };
    let mut server = Server::new(sink);
    server
        .with_name("sink.soak.example")
        .with_tcp_listener(listener);
    if let Err(e) = server.serve() {
        eprintln!("smtp_sink: {e}");
        std::process::exit(1);
    }
}
