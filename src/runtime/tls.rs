//! TLS to the broker: a rustls client configuration built from PEM files, on the `ring` crypto provider.
//!
//! rumqttc is built with `use-rustls-no-provider`, so the crypto provider is ours to choose rather than rustls'
//! default (aws-lc-rs, which needs cmake and a C toolchain that cross-compiles awkwardly to the ARM boards many
//! gateways are). `ring` builds with a plain C compiler on every target we care about. The provider is passed to
//! the config explicitly, never installed process-wide, so nothing else in the process is affected.
//!
//! The server is verified against the CA file when one is given, else against the platform's trust store. A client
//! certificate and key (mutual TLS) must be given together. Every failure names the file.

use rustls::pki_types::pem::PemObject;
use rustls::pki_types::{CertificateDer, PrivateKeyDer};
use rustls::{ClientConfig, RootCertStore};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use thiserror::Error;

/// Where the TLS material is; every path optional, but a certificate needs its key and vice versa.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct TlsFiles {
    /// PEM file of the CA certificate(s) that signed the broker's certificate; None: the platform's trust store.
    pub ca: Option<PathBuf>,
    /// PEM file of this client's certificate chain, for brokers that require client certificates.
    pub cert: Option<PathBuf>,
    /// PEM file of the client certificate's private key (PKCS#8, PKCS#1 or SEC1).
    pub key: Option<PathBuf>,
}

/// Why a TLS configuration could not be built.
#[derive(Debug, Error)]
pub enum TlsError {
    #[error("{path}: cannot read {what}: {message}")]
    Read {
        path: String,
        what: &'static str,
        message: String,
    },
    #[error("{path}: no PEM certificate in the file")]
    NoCertificate { path: String },
    #[error("{path}: none of its certificates is a usable CA certificate")]
    NoUsableCa { path: String },
    #[error("no CA file given and the platform's trust store has no usable certificate ({0})")]
    NoPlatformRoots(String),
    #[error("a client certificate needs its key and a key needs its certificate: give both tls cert and key")]
    HalfClientAuth,
    #[error("TLS setup: {0}")]
    Rustls(#[from] rustls::Error),
}

/// Builds the rustls client configuration for `files`.
pub fn client_config(files: &TlsFiles) -> Result<Arc<ClientConfig>, TlsError> {
    if files.cert.is_some() != files.key.is_some() {
        return Err(TlsError::HalfClientAuth);
    }
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let roots = match &files.ca {
        Some(path) => ca_roots(path)?,
        None => platform_roots()?,
    };
    let builder = ClientConfig::builder_with_provider(provider)
        .with_safe_default_protocol_versions()?
        .with_root_certificates(roots);
    let config = match (&files.cert, &files.key) {
        (Some(cert), Some(key)) => builder
            .with_client_auth_cert(certificates(cert, "client certificate")?, private_key(key)?)?,
        _ => builder.with_no_client_auth(),
    };
    Ok(Arc::new(config))
}

fn display(path: &Path) -> String {
    path.display().to_string()
}

fn certificates(path: &Path, what: &'static str) -> Result<Vec<CertificateDer<'static>>, TlsError> {
    let read_error = |message: String| TlsError::Read {
        path: display(path),
        what,
        message,
    };
    let certs = CertificateDer::pem_file_iter(path)
        .map_err(|e| read_error(e.to_string()))?
        .collect::<Result<Vec<_>, _>>()
        .map_err(|e| read_error(e.to_string()))?;
    if certs.is_empty() {
        return Err(TlsError::NoCertificate {
            path: display(path),
        });
    }
    Ok(certs)
}

fn ca_roots(path: &Path) -> Result<RootCertStore, TlsError> {
    let mut roots = RootCertStore::empty();
    let (added, _ignored) = roots.add_parsable_certificates(certificates(path, "CA certificates")?);
    if added == 0 {
        return Err(TlsError::NoUsableCa {
            path: display(path),
        });
    }
    Ok(roots)
}

fn platform_roots() -> Result<RootCertStore, TlsError> {
    let found = rustls_native_certs::load_native_certs();
    let mut roots = RootCertStore::empty();
    roots.add_parsable_certificates(found.certs);
    if roots.is_empty() {
        let why = found
            .errors
            .first()
            .map_or_else(|| "none found".to_string(), ToString::to_string);
        return Err(TlsError::NoPlatformRoots(why));
    }
    Ok(roots)
}

fn private_key(path: &Path) -> Result<PrivateKeyDer<'static>, TlsError> {
    PrivateKeyDer::from_pem_file(path).map_err(|e| TlsError::Read {
        path: display(path),
        what: "private key",
        message: e.to_string(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Write;

    fn file(text: &str) -> tempfile::NamedTempFile {
        let mut f = tempfile::NamedTempFile::new().unwrap();
        f.write_all(text.as_bytes()).unwrap();
        f
    }

    #[test]
    fn missing_files_are_named() {
        let e = client_config(&TlsFiles {
            ca: Some("no/such/ca.pem".into()),
            ..TlsFiles::default()
        })
        .unwrap_err()
        .to_string();
        assert!(
            e.starts_with("no/such/ca.pem: cannot read CA certificates"),
            "{e}"
        );
    }

    #[test]
    fn a_file_without_certificates_is_refused() {
        let f = file("just some text, no PEM blocks\n");
        let e = client_config(&TlsFiles {
            ca: Some(f.path().into()),
            ..TlsFiles::default()
        })
        .unwrap_err();
        assert!(matches!(e, TlsError::NoCertificate { .. }), "{e}");
    }

    #[test]
    fn garbage_inside_a_certificate_block_is_not_a_ca() {
        let f = file("-----BEGIN CERTIFICATE-----\nAAAA\n-----END CERTIFICATE-----\n");
        let e = client_config(&TlsFiles {
            ca: Some(f.path().into()),
            ..TlsFiles::default()
        })
        .unwrap_err();
        assert!(matches!(e, TlsError::NoUsableCa { .. }), "{e}");
    }

    #[test]
    fn certificate_without_key_is_refused() {
        let f = file("-----BEGIN CERTIFICATE-----\nAAAA\n-----END CERTIFICATE-----\n");
        let e = client_config(&TlsFiles {
            ca: None,
            cert: Some(f.path().into()),
            key: None,
        });
        assert!(matches!(e, Err(TlsError::HalfClientAuth)));
    }
}
