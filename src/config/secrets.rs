//! Keeping secrets out of everything simtide prints. Values of `[kafka.client]` whose key
//! names a credential are masked in printed configuration, and any text that leaves the
//! process (log lines, error messages, librdkafka's own messages) can be scrubbed of the
//! secret values themselves.

use super::Config;

/// What replaces a secret.
pub const MASK: &str = "****";

/// Words that make a property name a secret (case-insensitive).
const SECRET_WORDS: [&str; 4] = ["password", "secret", "token", "key"];

/// Whether a librdkafka property holds a credential.
pub fn is_secret_key(key: &str) -> bool {
    let lower = key.to_ascii_lowercase();
    SECRET_WORDS.iter().any(|w| lower.contains(w))
}

/// The secret values of a configuration, for scrubbing text.
#[derive(Debug, Clone, Default)]
pub struct Scrubber {
    values: Vec<String>,
}

impl Scrubber {
    /// Collects the secret values of `[kafka.client]`.
    pub fn of(config: &Config) -> Scrubber {
        let mut values: Vec<String> = config
            .kafka
            .client
            .iter()
            .filter(|(k, v)| is_secret_key(k) && !v.is_empty())
            .map(|(_, v)| v.clone())
            .chain((!config.http.admin_token.is_empty()).then(|| config.http.admin_token.clone()))
            .collect();
        // Longest first, so a secret that contains another is masked whole.
        values.sort_by_key(|v| std::cmp::Reverse(v.len()));
        Scrubber { values }
    }

    /// The secrets of a configuration file and the environment, read leniently: error
    /// messages about a file that does not load must not quote its secrets either.
    pub fn of_sources(
        path: Option<&std::path::Path>,
        env: impl IntoIterator<Item = (String, String)>,
    ) -> Scrubber {
        let mut values = Vec::new();
        let table = path
            .and_then(|p| std::fs::read_to_string(p).ok())
            .and_then(|text| text.parse::<toml::Table>().ok());
        let client = table
            .as_ref()
            .and_then(|t| t.get("kafka"))
            .and_then(|k| k.get("client"))
            .and_then(|c| c.as_table());
        for (key, value) in client.into_iter().flatten() {
            if is_secret_key(key) {
                values.push(value.as_str().map_or_else(|| value.to_string(), str::to_string));
            }
        }
        for (name, value) in env {
            let upper = name.to_ascii_uppercase();
            let client_secret = upper.contains("__CLIENT__") && is_secret_key(&name);
            if name.starts_with(super::ENV_PREFIX) && (client_secret || upper.ends_with("__ADMIN_TOKEN")) {
                values.push(value);
            }
        }
        values.retain(|v| !v.is_empty());
        values.sort_by_key(|v| std::cmp::Reverse(v.len()));
        Scrubber { values }
    }

    /// `text` with every secret value replaced by the mask.
    pub fn scrub(&self, text: &str) -> String {
        let mut out = text.to_string();
        for v in &self.values {
            if out.contains(v.as_str()) {
                out = out.replace(v.as_str(), MASK);
            }
        }
        out
    }
}

/// The configuration as it would be printed: secret values masked.
pub fn masked(config: &Config) -> Config {
    let mut shown = config.clone();
    if !shown.http.admin_token.is_empty() {
        shown.http.admin_token = MASK.to_string();
    }
    for (key, value) in shown.kafka.client.iter_mut() {
        if is_secret_key(key) {
            *value = MASK.to_string();
        }
    }
    shown
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn credential_keys_are_masked_and_scrubbed() {
        let mut c = Config::default();
        c.kafka
            .client
            .insert("sasl.password".into(), "marsh-fennel-42".into());
        c.kafka
            .client
            .insert("sasl.oauthbearer.token.endpoint.url".into(), "https://t".into());
        c.kafka
            .client
            .insert("security.protocol".into(), "SASL_SSL".into());
        let shown = masked(&c);
        assert_eq!(shown.kafka.client["sasl.password"], MASK);
        assert_eq!(shown.kafka.client["security.protocol"], "SASL_SSL");
        let s = Scrubber::of(&c);
        assert_eq!(
            s.scrub("login failed with marsh-fennel-42 for user"),
            "login failed with **** for user"
        );
    }
}
