//! HTTPS with rustls (ring provider, no OpenSSL): the server certificate and key, and for
//! mutual TLS the CA whose client certificates are accepted. Read at start and again on
//! SIGHUP; a failed re-read keeps the previous files serving.

use std::path::{Path, PathBuf};
use std::sync::{Arc, RwLock};

use rustls::pki_types::pem::PemObject as _;
use rustls::pki_types::{CertificateDer, PrivateKeyDer};
use tokio_rustls::TlsAcceptor;

/// `[server] tls_cert`, `tls_key`, `tls_client_ca`, resolved against the config's folder.
#[derive(Debug, Clone)]
pub struct TlsFiles {
    /// PEM: the server's certificate chain, leaf first.
    pub cert: PathBuf,
    /// PEM: its private key (PKCS#8, PKCS#1 or SEC1).
    pub key: PathBuf,
    /// PEM: CA certificates; when set, every client must present a certificate they sign.
    pub client_ca: Option<PathBuf>,
}

/// The current TLS settings, swapped whole on a re-read; each connection takes the ones
/// current when it arrives.
pub struct Tls {
    files: TlsFiles,
    current: RwLock<Arc<rustls::ServerConfig>>,
}

impl std::fmt::Debug for Tls {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Tls").field("files", &self.files).finish_non_exhaustive()
    }
}

impl Tls {
    /// Read the files.
    ///
    /// # Errors
    /// A file that is missing or unreadable, holds no certificate or key, a key that does
    /// not match the certificate, or a CA file with no usable certificate.
    pub fn load(files: TlsFiles) -> Result<Tls, String> {
        let config = server_config(&files)?;
        Ok(Tls { files, current: RwLock::new(Arc::new(config)) })
    }

    /// Re-read the files; on failure the previous ones stay in use.
    ///
    /// # Errors
    /// As [`Tls::load`].
    pub fn reload(&self) -> Result<(), String> {
        let config = server_config(&self.files)?;
        *self.current.write().unwrap_or_else(std::sync::PoisonError::into_inner) = Arc::new(config);
        Ok(())
    }

    /// An acceptor with the settings current now.
    pub fn acceptor(&self) -> TlsAcceptor {
        TlsAcceptor::from(Arc::clone(&self.current.read().unwrap_or_else(std::sync::PoisonError::into_inner)))
    }

    /// Whether clients must present a certificate.
    pub fn mutual(&self) -> bool {
        self.files.client_ca.is_some()
    }
}

fn provider() -> Arc<rustls::crypto::CryptoProvider> {
    Arc::new(rustls::crypto::ring::default_provider())
}

fn server_config(files: &TlsFiles) -> Result<rustls::ServerConfig, String> {
    let certs = certificates("tls_cert", &files.cert)?;
    let key = PrivateKeyDer::from_pem_file(&files.key).map_err(|e| {
        format!("server.tls_key = {:?}: no private key read ({e}); expected a PEM file with one key", files.key)
    })?;
    warn_if_world_readable(&files.key);
    let builder = rustls::ServerConfig::builder_with_provider(provider())
        .with_safe_default_protocol_versions()
        .map_err(|e| format!("TLS: {e}"))?;
    let builder = match &files.client_ca {
        None => builder.with_no_client_auth(),
        Some(ca) => {
            let mut roots = rustls::RootCertStore::empty();
            for c in certificates("tls_client_ca", ca)? {
                roots
                    .add(c)
                    .map_err(|e| format!("server.tls_client_ca = {ca:?}: a certificate is not a usable CA: {e}"))?;
            }
            let verifier = rustls::server::WebPkiClientVerifier::builder_with_provider(Arc::new(roots), provider())
                .build()
                .map_err(|e| format!("server.tls_client_ca = {ca:?}: {e}"))?;
            builder.with_client_cert_verifier(verifier)
        }
    };
    let mut config = builder.with_single_cert(certs, key).map_err(|e| {
        format!(
            "server.tls_cert = {:?} and server.tls_key = {:?} do not make a certificate and its key: {e}",
            files.cert, files.key
        )
    })?;
    // The connection builder speaks both; ALPN tells the client which it may use.
    config.alpn_protocols = vec![b"h2".to_vec(), b"http/1.1".to_vec()];
    Ok(config)
}

fn certificates(key: &str, path: &Path) -> Result<Vec<CertificateDer<'static>>, String> {
    let certs: Vec<CertificateDer<'static>> = CertificateDer::pem_file_iter(path)
        .map_err(|e| format!("server.{key} = {path:?}: cannot read it: {e}"))?
        .collect::<Result<_, _>>()
        .map_err(|e| format!("server.{key} = {path:?}: not a PEM certificate file: {e}"))?;
    if certs.is_empty() {
        return Err(format!(
            "server.{key} = {path:?} holds no certificate (expected PEM blocks \"BEGIN CERTIFICATE\")"
        ));
    }
    Ok(certs)
}

fn warn_if_world_readable(path: &Path) {
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt as _;
        if let Ok(meta) = std::fs::metadata(path) {
            let mode = meta.permissions().mode() & 0o777;
            if mode & 0o004 != 0 {
                tracing::warn!(path = %path.display(), mode = format!("{mode:04o}"), "the TLS key is readable by every user; chmod 600 it");
            }
        }
    }
}

/// The first byte of every TLS connection: a handshake record (RFC 8446, section 5.1).
pub const HANDSHAKE_RECORD: u8 = 0x16;

/// What a client that speaks plain HTTP to the HTTPS port gets before the connection closes:
/// a 400 in the API's error shape, so a misconfigured camera PC logs a reason, not a hang.
pub fn plain_http_refusal() -> Vec<u8> {
    let body = r#"{"error":{"kind":"bad_request","message":"this port speaks HTTPS only; use an https:// URL"}}"#;
    format!(
        "HTTP/1.1 400 Bad Request\r\ncontent-type: application/json\r\nconnection: close\r\ncontent-length: {}\r\n\r\n{body}",
        body.len()
    )
    .into_bytes()
}
