//! A real SMTP server on 127.0.0.1 for the email tests: `mailin-embedded` (plain and
//! STARTTLS) with a handler that records every accepted message and can be told to answer
//! the next recipients with a given reply (4xx, 5xx) instead of accepting them.
//!
//! The refusal is given to RCPT TO, not at the end of DATA: mailin 0.6 stays in its DATA
//! state after an error reply to the final dot, so the client's QUIT is read as message
//! text and never answered (a refusal after DATA would hang the session, not test it).

use std::collections::VecDeque;
use std::net::{IpAddr, TcpListener};
use std::path::Path;
use std::sync::{Arc, Mutex};

use mailin_embedded::{AuthMechanism, Handler, Response, Server, SslConfig, response};

/// One message the server accepted.
#[derive(Debug, Clone)]
pub struct Received {
    pub from: String,
    pub to: Vec<String>,
    /// The message as sent (headers and body, CRLF line ends, dot-unstuffed).
    pub data: Vec<u8>,
    /// EHLO/HELO commands seen on the connection before this message (2 after STARTTLS).
    pub hellos: usize,
}

#[derive(Default)]
struct Shared {
    received: Vec<Received>,
    /// Replies to give to RCPT TO instead of accepting, first one first.
    replies: VecDeque<(u16, String)>,
    /// RCPT TO commands seen, accepted or refused.
    attempts: usize,
    /// The password AUTH must present, when AUTH is offered.
    password: Option<String>,
    auth_ok: usize,
}

#[derive(Clone)]
struct Recorder {
    shared: Arc<Mutex<Shared>>,
    from: String,
    to: Vec<String>,
    data: Vec<u8>,
    hellos: usize,
}

impl Handler for Recorder {
    fn helo(&mut self, _ip: IpAddr, _domain: &str) -> Response {
        self.hellos += 1;
        response::OK
    }

    fn rcpt(&mut self, _to: &str) -> Response {
        let mut s = self.shared.lock().unwrap();
        s.attempts += 1;
        match s.replies.pop_front() {
            Some((code, text)) => Response::custom(code, text),
            None => response::OK,
        }
    }

    fn data_start(&mut self, _domain: &str, from: &str, _is8bit: bool, to: &[String]) -> Response {
        self.from = from.to_string();
        self.to = to.to_vec();
        self.data.clear();
        response::OK
    }

    fn data(&mut self, buf: &[u8]) -> std::io::Result<()> {
        self.data.extend_from_slice(buf);
        Ok(())
    }

    fn data_end(&mut self) -> Response {
        let mut s = self.shared.lock().unwrap();
        s.received.push(Received {
            from: self.from.clone(),
            to: self.to.clone(),
            data: std::mem::take(&mut self.data),
            hellos: self.hellos,
        });
        response::OK
    }

    fn auth_plain(&mut self, _authz: &str, _user: &str, password: &str) -> Response {
        let mut s = self.shared.lock().unwrap();
        if s.password.as_deref() == Some(password) {
            s.auth_ok += 1;
            response::AUTH_OK
        } else {
            response::INVALID_CREDENTIALS
        }
    }
}

/// A running server. It runs until the test process ends (mailin has no stop).
pub struct SmtpServer {
    pub port: u16,
    shared: Arc<Mutex<Shared>>,
}

/// A port on 127.0.0.1 that nothing listens on (bound, read, released).
pub fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

/// TLS material of a STARTTLS server: the leaf certificate and key files it serves.
pub struct TlsFiles<'a> {
    pub cert: &'a Path,
    pub key: &'a Path,
}

impl SmtpServer {
    /// A plain server on a fresh port.
    pub fn start() -> SmtpServer {
        SmtpServer::start_with(0, None, None)
    }

    /// A plain server on `port` (for a server that was "down" and comes back).
    pub fn start_on(port: u16) -> SmtpServer {
        SmtpServer::start_with(port, None, None)
    }

    /// A server offering STARTTLS with the given certificate, and AUTH PLAIN (after TLS)
    /// accepting `password` when one is given.
    pub fn start_tls(tls: TlsFiles<'_>, password: Option<&str>) -> SmtpServer {
        SmtpServer::start_with(0, Some(tls), password)
    }

    fn start_with(port: u16, tls: Option<TlsFiles<'_>>, password: Option<&str>) -> SmtpServer {
        // mailin brings rustls with aws-lc-rs, lettre's test build brings ring: with two
        // providers compiled in, one must be chosen for the process before TLS is set up.
        let _ = rustls::crypto::ring::default_provider().install_default();
        let listener = TcpListener::bind(("127.0.0.1", port)).unwrap();
        let port = listener.local_addr().unwrap().port();
        let shared = Arc::new(Mutex::new(Shared {
            password: password.map(str::to_string),
            ..Shared::default()
        }));
        let handler = Recorder {
            shared: shared.clone(),
            from: String::new(),
            to: Vec::new(),
            data: Vec::new(),
            hellos: 0,
        };
        let mut server = Server::new(handler);
        server
            .with_name("mx.test.example")
            .with_tcp_listener(listener);
        if let Some(t) = tls {
            server
                .with_ssl(SslConfig::SelfSigned {
                    cert_path: t.cert.display().to_string(),
                    key_path: t.key.display().to_string(),
                })
                .unwrap();
        }
        if password.is_some() {
            server.with_auth(AuthMechanism::Plain);
        }
        std::thread::spawn(move || {
            let _ = server.serve();
        });
        SmtpServer { port, shared }
    }

    /// Answers the next RCPT TO with `code text` instead of accepting the recipient.
    pub fn reply_next(&self, code: u16, text: &str) {
        self.shared
            .lock()
            .unwrap()
            .replies
            .push_back((code, text.to_string()));
    }

    /// Messages accepted so far.
    pub fn received(&self) -> Vec<Received> {
        self.shared.lock().unwrap().received.clone()
    }

    /// Recipients offered so far (RCPT TO), accepted or refused.
    pub fn attempts(&self) -> usize {
        self.shared.lock().unwrap().attempts
    }

    /// Successful AUTH commands.
    pub fn auth_ok(&self) -> usize {
        self.shared.lock().unwrap().auth_ok
    }
}

/// A test CA and a leaf certificate for localhost and 127.0.0.1 signed by it, written as
/// PEM files into `dir`: (ca.pem, leaf.pem, leaf-key.pem). A self-signed CA certificate
/// cannot serve as the server's own certificate (rustls refuses a CA as end entity), hence
/// the two levels.
pub fn test_pki(dir: &Path) -> (std::path::PathBuf, std::path::PathBuf, std::path::PathBuf) {
    use rcgen::{
        BasicConstraints, CertificateParams, DnType, ExtendedKeyUsagePurpose, IsCa, Issuer,
        KeyPair, KeyUsagePurpose,
    };
    let ca_key = KeyPair::generate().unwrap();
    let mut ca = CertificateParams::new(Vec::<String>::new()).unwrap();
    ca.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    ca.distinguished_name
        .push(DnType::CommonName, "lotdrift test CA");
    ca.key_usages = vec![KeyUsagePurpose::KeyCertSign, KeyUsagePurpose::CrlSign];
    let ca_cert = ca.self_signed(&ca_key).unwrap();
    let issuer = Issuer::new(ca, ca_key);

    let leaf_key = KeyPair::generate().unwrap();
    let mut leaf =
        CertificateParams::new(vec!["localhost".to_string(), "127.0.0.1".to_string()]).unwrap();
    leaf.distinguished_name
        .push(DnType::CommonName, "localhost");
    leaf.extended_key_usages = vec![ExtendedKeyUsagePurpose::ServerAuth];
    let leaf_cert = leaf.signed_by(&leaf_key, &issuer).unwrap();

    let paths = (
        dir.join("ca.pem"),
        dir.join("leaf.pem"),
        dir.join("leaf-key.pem"),
    );
    std::fs::write(&paths.0, ca_cert.pem()).unwrap();
    std::fs::write(&paths.1, leaf_cert.pem()).unwrap();
    std::fs::write(&paths.2, leaf_key.serialize_pem()).unwrap();
    paths
}
