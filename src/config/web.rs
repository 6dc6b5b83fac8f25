//! `[server] web_config`: the web-config file that turns on TLS and basic
//! auth for the HTTP server (README, "Serving over the network (TLS, basic
//! auth)").
//!
//! The file is YAML and uses the keys of the Prometheus exporters' web
//! configuration (common practice), so a plant can reuse the file it
//! already has for its other exporters:
//!
//! ```yaml
//! tls_server_config:
//!   cert_file: server.crt          # PEM chain, leaf first
//!   key_file: server.key           # PEM private key (PKCS#8, PKCS#1 or SEC1)
//!   client_auth_type: NoClientCert # or VerifyClientCertIfGiven, RequireAndVerifyClientCert
//!   client_ca_file: clients.crt    # PEM roots for client certificates
//!   min_version: TLS12             # or TLS13
//!   max_version: TLS13
//! basic_auth_users:
//!   scraper: $2b$10$...            # bcrypt hash
//! ```
//!
//! Relative paths in it resolve against the web-config file's directory.
//! A key this file does not know is an error naming the key (serde's
//! `deny_unknown_fields`); so is a value bandwatch does not support (e.g.
//! `min_version: TLS10`, which rustls does not speak).
//!
//! Checking goes all the way: the files are read, the certificates and the
//! key parsed, the key matched against the leaf certificate, and the rustls
//! server config built — so what `bandwatch check` accepts, the daemon
//! starts with. Every error names its field.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use rustls::pki_types::pem::PemObject;
use rustls::pki_types::{CertificateDer, PrivateKeyDer};
use serde::Deserialize;

/// The file as serde reads it.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawWebConfig {
    #[serde(default)]
    tls_server_config: Option<RawTls>,
    #[serde(default)]
    basic_auth_users: Option<BTreeMap<String, String>>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawTls {
    #[serde(default)]
    cert_file: Option<PathBuf>,
    #[serde(default)]
    key_file: Option<PathBuf>,
    #[serde(default)]
    client_auth_type: Option<String>,
    #[serde(default)]
    client_ca_file: Option<PathBuf>,
    #[serde(default)]
    min_version: Option<String>,
    #[serde(default)]
    max_version: Option<String>,
}

/// Whether and how clients must show a certificate (the convention's
/// `client_auth_type` names).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ClientAuth {
    /// No client certificate asked for (the default).
    NoClientCert,
    /// A client certificate, if sent, must chain to `client_ca_file`.
    VerifyClientCertIfGiven,
    /// Every client must send a certificate chaining to `client_ca_file`.
    RequireAndVerifyClientCert,
}

impl ClientAuth {
    fn parse(s: &str) -> Result<ClientAuth, String> {
        match s {
            "NoClientCert" => Ok(ClientAuth::NoClientCert),
            "VerifyClientCertIfGiven" => Ok(ClientAuth::VerifyClientCertIfGiven),
            "RequireAndVerifyClientCert" => Ok(ClientAuth::RequireAndVerifyClientCert),
            "RequestClientCert" | "RequireAnyClientCert" => Err(format!(
                "{s:?} (a certificate that is not verified) is not supported; use \
                 VerifyClientCertIfGiven or RequireAndVerifyClientCert"
            )),
            _ => Err(format!(
                "{s:?} is not one of NoClientCert, VerifyClientCertIfGiven, \
                 RequireAndVerifyClientCert"
            )),
        }
    }
}

/// A TLS protocol version (the convention's `min_version`/`max_version`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum TlsVersion {
    Tls12,
    Tls13,
}

impl TlsVersion {
    fn parse(s: &str) -> Result<TlsVersion, String> {
        match s {
            "TLS12" => Ok(TlsVersion::Tls12),
            "TLS13" => Ok(TlsVersion::Tls13),
            "TLS10" | "TLS11" => Err(format!(
                "{s} is not supported (rustls speaks TLS12 and TLS13 only)"
            )),
            _ => Err(format!("{s:?} is not one of TLS12, TLS13")),
        }
    }
}

/// The checked TLS settings, with the built rustls server config.
#[derive(Debug, Clone)]
pub struct TlsSettings {
    pub cert_file: PathBuf,
    pub key_file: PathBuf,
    pub client_auth: ClientAuth,
    pub client_ca_file: Option<PathBuf>,
    pub min_version: TlsVersion,
    pub max_version: TlsVersion,
    /// Ready for `tokio_rustls::TlsAcceptor`.
    pub server: Arc<rustls::ServerConfig>,
}

/// The checked web config.
#[derive(Debug, Clone)]
pub struct WebConfig {
    /// The file it came from.
    pub path: PathBuf,
    pub tls: Option<TlsSettings>,
    /// Basic-auth users: name to bcrypt hash. Empty: no basic auth.
    pub users: BTreeMap<String, String>,
}

/// What is wrong with a web-config file; every variant names the file and,
/// where there is one, the field.
#[derive(Debug, thiserror::Error)]
pub enum WebConfigError {
    #[error("cannot read web config {path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("web config {path} is not valid YAML for bandwatch: {message}")]
    Yaml { path: PathBuf, message: String },
    #[error("web config {path}: {field}: cannot read {file}: {source}")]
    File {
        path: PathBuf,
        field: String,
        file: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("web config {path}: {field}: {message}")]
    Invalid {
        path: PathBuf,
        field: String,
        message: String,
    },
}

/// Reads and checks the web-config file at `path` (see the module docs).
///
/// # Errors
/// The file cannot be read or parsed, a key is unknown, a value is not
/// supported, a referenced file cannot be read or parsed, the key does not
/// match the certificate, or a user's hash is not a bcrypt hash.
pub fn load_web_config(path: &Path) -> Result<WebConfig, WebConfigError> {
    let text = std::fs::read_to_string(path).map_err(|source| WebConfigError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    let dir = path.parent().unwrap_or(Path::new(""));
    parse_web_config(&text, path, dir)
}

/// Checks web-config `text`; `path` names it in errors, relative paths in
/// it resolve against `dir`.
///
/// # Errors
/// As [`load_web_config`], less the reading of the file itself.
pub fn parse_web_config(text: &str, path: &Path, dir: &Path) -> Result<WebConfig, WebConfigError> {
    let raw: RawWebConfig = if text.trim().is_empty() {
        RawWebConfig::default()
    } else {
        serde_saphyr::from_str(text).map_err(|e| WebConfigError::Yaml {
            path: path.to_path_buf(),
            message: e.to_string(),
        })?
    };
    let invalid = |field: &str, message: String| WebConfigError::Invalid {
        path: path.to_path_buf(),
        field: field.to_string(),
        message,
    };
    let users = raw.basic_auth_users.unwrap_or_default();
    for (name, hash) in &users {
        check_user(name, hash).map_err(|m| invalid(&format!("basic_auth_users.{name}"), m))?;
    }
    let tls = match raw.tls_server_config {
        None => None,
        Some(t) => Some(check_tls(t, path, dir)?),
    };
    Ok(WebConfig {
        path: path.to_path_buf(),
        tls,
        users,
    })
}

/// A user name fits a basic-auth header (no colon, RFC 7617 §2) and the
/// hash is a bcrypt hash ($2a$, $2b$, $2x$ or $2y$, cost 4 to 31, 53
/// characters of salt and hash; the bcrypt crate's parser, plus the cost
/// range it does not check).
fn check_user(name: &str, hash: &str) -> Result<(), String> {
    if name.is_empty() || name.contains(':') || name.chars().any(char::is_control) {
        return Err("a user name must be non-empty, without ':' or control characters".into());
    }
    match hash.parse::<bcrypt::HashParts>() {
        Ok(p) if (4..=31).contains(&p.get_cost()) => Ok(()),
        Ok(p) => Err(format!(
            "bcrypt cost {} is out of range 4 to 31",
            p.get_cost()
        )),
        Err(_) => Err(
            "not a bcrypt hash (\"$2b$\" or \"$2a$\"/\"$2y$\", a two-digit cost, 53 characters \
             of salt and hash)"
                .into(),
        ),
    }
}

fn check_tls(raw: RawTls, path: &Path, dir: &Path) -> Result<TlsSettings, WebConfigError> {
    let invalid = |field: &str, message: String| WebConfigError::Invalid {
        path: path.to_path_buf(),
        field: format!("tls_server_config.{field}"),
        message,
    };
    let resolve = |p: PathBuf| if p.is_absolute() { p } else { dir.join(p) };
    let cert_file = raw
        .cert_file
        .map(resolve)
        .ok_or_else(|| invalid("cert_file", "is required with tls_server_config".into()))?;
    let key_file = raw
        .key_file
        .map(resolve)
        .ok_or_else(|| invalid("key_file", "is required with tls_server_config".into()))?;
    let client_auth = match raw.client_auth_type.as_deref() {
        None | Some("") => ClientAuth::NoClientCert,
        Some(s) => ClientAuth::parse(s).map_err(|m| invalid("client_auth_type", m))?,
    };
    let client_ca_file = raw.client_ca_file.map(resolve);
    match (client_auth, &client_ca_file) {
        (ClientAuth::NoClientCert, Some(_)) => {
            return Err(invalid(
                "client_ca_file",
                "is given but client_auth_type is NoClientCert; set client_auth_type to \
                 VerifyClientCertIfGiven or RequireAndVerifyClientCert"
                    .into(),
            ))
        }
        (ClientAuth::NoClientCert, None) | (_, Some(_)) => {}
        (_, None) => {
            return Err(invalid(
                "client_ca_file",
                "is required to verify client certificates".into(),
            ))
        }
    }
    let version = |field: &str, v: Option<&str>, default: TlsVersion| match v {
        None | Some("") => Ok(default),
        Some(s) => TlsVersion::parse(s).map_err(|m| invalid(field, m)),
    };
    let min_version = version("min_version", raw.min_version.as_deref(), TlsVersion::Tls12)?;
    let max_version = version("max_version", raw.max_version.as_deref(), TlsVersion::Tls13)?;
    if min_version > max_version {
        return Err(invalid("min_version", "is above max_version".to_string()));
    }

    let read = |field: &str, file: &Path| {
        std::fs::read(file).map_err(|source| WebConfigError::File {
            path: path.to_path_buf(),
            field: format!("tls_server_config.{field}"),
            file: file.to_path_buf(),
            source,
        })
    };
    let certs = pem_certs(&read("cert_file", &cert_file)?)
        .map_err(|m| invalid("cert_file", format!("{}: {m}", cert_file.display())))?;
    let key = PrivateKeyDer::from_pem_slice(&read("key_file", &key_file)?).map_err(|e| {
        invalid(
            "key_file",
            format!("{}: no PEM private key ({e})", key_file.display()),
        )
    })?;
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let signing = provider
        .key_provider
        .load_private_key(key.clone_key())
        .map_err(|e| invalid("key_file", format!("{}: {e}", key_file.display())))?;
    let certified = rustls::sign::CertifiedKey::new(certs.clone(), signing);
    certified.keys_match().map_err(|e| {
        invalid(
            "key_file",
            format!(
                "{} does not belong to the certificate in {} ({e})",
                key_file.display(),
                cert_file.display()
            ),
        )
    })?;

    let versions: Vec<&'static rustls::SupportedProtocolVersion> = [
        (TlsVersion::Tls12, &rustls::version::TLS12),
        (TlsVersion::Tls13, &rustls::version::TLS13),
    ]
    .into_iter()
    .filter(|(v, _)| (min_version..=max_version).contains(v))
    .map(|(_, p)| p)
    .collect();
    let builder = rustls::ServerConfig::builder_with_provider(provider.clone())
        .with_protocol_versions(&versions)
        .map_err(|e| invalid("min_version", e.to_string()))?;
    let builder = match (&client_ca_file, client_auth) {
        (
            Some(ca),
            ClientAuth::VerifyClientCertIfGiven | ClientAuth::RequireAndVerifyClientCert,
        ) => {
            let mut roots = rustls::RootCertStore::empty();
            let cas = pem_certs(&read("client_ca_file", ca)?)
                .map_err(|m| invalid("client_ca_file", format!("{}: {m}", ca.display())))?;
            for c in cas {
                roots
                    .add(c)
                    .map_err(|e| invalid("client_ca_file", format!("{}: {e}", ca.display())))?;
            }
            let verifier = rustls::server::WebPkiClientVerifier::builder_with_provider(
                Arc::new(roots),
                provider,
            );
            let verifier = if client_auth == ClientAuth::VerifyClientCertIfGiven {
                verifier.allow_unauthenticated()
            } else {
                verifier
            };
            let verifier = verifier
                .build()
                .map_err(|e| invalid("client_ca_file", e.to_string()))?;
            builder.with_client_cert_verifier(verifier)
        }
        _ => builder.with_no_client_auth(),
    };
    let mut server = builder
        .with_single_cert(certs, key)
        .map_err(|e| invalid("key_file", format!("{}: {e}", key_file.display())))?;
    // Only HTTP/1.1 is served.
    server.alpn_protocols = vec![b"http/1.1".to_vec()];
    Ok(TlsSettings {
        cert_file,
        key_file,
        client_auth,
        client_ca_file,
        min_version,
        max_version,
        server: Arc::new(server),
    })
}

/// Every certificate of a PEM bundle; at least one.
fn pem_certs(pem: &[u8]) -> Result<Vec<CertificateDer<'static>>, String> {
    let certs = CertificateDer::pem_slice_iter(pem)
        .collect::<Result<Vec<_>, _>>()
        .map_err(|e| format!("not a PEM certificate file ({e})"))?;
    if certs.is_empty() {
        return Err("holds no PEM certificate".into());
    }
    Ok(certs)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A scratch directory, removed on drop.
    struct Dir(PathBuf);

    impl Dir {
        fn new(tag: &str) -> Dir {
            use std::sync::atomic::{AtomicU32, Ordering};
            static N: AtomicU32 = AtomicU32::new(0);
            let p = std::env::temp_dir().join(format!(
                "bandwatch-web-{tag}-{}-{}",
                std::process::id(),
                N.fetch_add(1, Ordering::Relaxed)
            ));
            let _ = std::fs::remove_dir_all(&p);
            std::fs::create_dir_all(&p).expect("temp dir");
            Dir(p)
        }

        fn write(&self, name: &str, text: &str) -> PathBuf {
            let p = self.0.join(name);
            std::fs::write(&p, text).expect("write");
            p
        }
    }

    impl Drop for Dir {
        fn drop(&mut self) {
            let _ = std::fs::remove_dir_all(&self.0);
        }
    }

    /// A self-signed certificate for localhost and its key, as PEM.
    fn cert() -> (String, String) {
        let c = rcgen::generate_simple_self_signed(vec!["localhost".to_string()]).expect("rcgen");
        (c.cert.pem(), c.signing_key.serialize_pem())
    }

    /// `dir` with server.crt/server.key and the web config `yaml`, loaded.
    fn load(dir: &Dir, yaml: &str) -> Result<WebConfig, WebConfigError> {
        let (crt, key) = cert();
        dir.write("server.crt", &crt);
        dir.write("server.key", &key);
        load_web_config(&dir.write("web.yml", yaml))
    }

    fn message(r: Result<WebConfig, WebConfigError>) -> String {
        match r {
            Ok(w) => panic!("accepted: {w:?}"),
            Err(e) => e.to_string(),
        }
    }

    /// A bcrypt hash of "test", made now (cost 4, the lowest, for speed).
    fn hash() -> String {
        bcrypt::hash("test", 4).expect("bcrypt")
    }

    #[test]
    fn a_full_file_loads_with_paths_beside_it() {
        let d = Dir::new("full");
        let w = load(
            &d,
            &format!(
                "tls_server_config:\n  cert_file: server.crt\n  key_file: server.key\n  \
                 min_version: TLS13\nbasic_auth_users:\n  scraper: {}\n",
                hash()
            ),
        )
        .expect("valid");
        let t = w.tls.expect("tls");
        assert_eq!(t.cert_file, d.0.join("server.crt"));
        assert_eq!(t.min_version, TlsVersion::Tls13);
        assert_eq!(t.max_version, TlsVersion::Tls13);
        assert_eq!(t.client_auth, ClientAuth::NoClientCert);
        assert_eq!(t.server.alpn_protocols, vec![b"http/1.1".to_vec()]);
        assert!(bcrypt::verify("test", &w.users["scraper"]).expect("verify"));
    }

    #[test]
    fn users_alone_and_an_empty_file_load() {
        let d = Dir::new("users");
        let w = load(&d, &format!("basic_auth_users:\n  a: {}\n", hash())).expect("valid");
        assert!(w.tls.is_none());
        assert_eq!(w.users.len(), 1);
        let w = load(&d, "").expect("empty file");
        assert!(w.tls.is_none() && w.users.is_empty());
    }

    #[test]
    fn unknown_keys_are_named() {
        let d = Dir::new("unknown");
        let m = message(load(&d, "tls_server_config:\n  cert_file: server.crt\n  key_file: server.key\n  cipher_suites: [TLS_AES_128_GCM_SHA256]\n"));
        assert!(m.contains("cipher_suites"), "{m}");
        let m = message(load(&d, "basic_auth_user:\n  a: b\n"));
        assert!(m.contains("basic_auth_user"), "{m}");
    }

    #[test]
    fn bad_values_are_named_by_field() {
        let d = Dir::new("values");
        let tls = "tls_server_config:\n  cert_file: server.crt\n  key_file: server.key\n";
        let cases = [
            ("basic_auth_users:\n  scraper: plaintext\n".to_string(), "basic_auth_users.scraper"),
            ("basic_auth_users:\n  scraper: $2b$99$01234567890123456789012345678901234567890123456789012\n".to_string(), "basic_auth_users.scraper"),
            (format!("basic_auth_users:\n  \"a:b\": {}\n", hash()), "basic_auth_users.a:b"),
            (format!("{tls}  min_version: TLS10\n"), "tls_server_config.min_version"),
            (format!("{tls}  min_version: TLS13\n  max_version: TLS12\n"), "tls_server_config.min_version"),
            (format!("{tls}  client_auth_type: RequireAndVerifyClientCert\n"), "tls_server_config.client_ca_file"),
            (format!("{tls}  client_auth_type: RequireAnyClientCert\n  client_ca_file: server.crt\n"), "tls_server_config.client_auth_type"),
            (format!("{tls}  client_ca_file: server.crt\n"), "tls_server_config.client_ca_file"),
            ("tls_server_config:\n  key_file: server.key\n".to_string(), "tls_server_config.cert_file"),
            ("tls_server_config:\n  cert_file: missing.crt\n  key_file: server.key\n".to_string(), "tls_server_config.cert_file"),
            ("tls_server_config:\n  cert_file: server.key\n  key_file: server.key\n".to_string(), "tls_server_config.cert_file"),
            ("tls_server_config:\n  cert_file: server.crt\n  key_file: server.crt\n".to_string(), "tls_server_config.key_file"),
        ];
        for (yaml, field) in cases {
            let m = message(load(&d, &yaml));
            assert!(m.contains(&format!("{field}:")), "{yaml}\n-> {m}");
        }
    }

    #[test]
    fn a_key_of_another_certificate_is_refused() {
        let d = Dir::new("mismatch");
        let (crt, _) = cert();
        let (_, other_key) = cert();
        dir_write_pair(&d, &crt, &other_key);
        let m = message(load_web_config(&d.write(
            "web.yml",
            "tls_server_config:\n  cert_file: a.crt\n  key_file: a.key\n",
        )));
        assert!(
            m.contains("tls_server_config.key_file:") && m.contains("does not belong"),
            "{m}"
        );
        // The matching pair is accepted (the check is not always-failing).
        let (crt, key) = cert();
        dir_write_pair(&d, &crt, &key);
        load_web_config(&d.0.join("web.yml")).expect("matching pair");
    }

    fn dir_write_pair(d: &Dir, crt: &str, key: &str) {
        d.write("a.crt", crt);
        d.write("a.key", key);
    }

    #[test]
    fn client_certificates_verified_against_the_ca_file() {
        let d = Dir::new("mtls");
        let (ca, _) = cert();
        d.write("ca.crt", &ca);
        for mode in ["RequireAndVerifyClientCert", "VerifyClientCertIfGiven"] {
            let w = load(
                &d,
                &format!(
                    "tls_server_config:\n  cert_file: server.crt\n  key_file: server.key\n  \
                     client_auth_type: {mode}\n  client_ca_file: ca.crt\n"
                ),
            )
            .expect("valid");
            let t = w.tls.expect("tls");
            assert_eq!(t.client_ca_file, Some(d.0.join("ca.crt")));
            let want = if mode == "RequireAndVerifyClientCert" {
                ClientAuth::RequireAndVerifyClientCert
            } else {
                ClientAuth::VerifyClientCertIfGiven
            };
            assert_eq!(t.client_auth, want);
        }
    }
}
