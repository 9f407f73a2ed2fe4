//! [`ConfigError`]: why a configuration was refused, naming the key at fault.

/// Why a configuration was refused.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ConfigError {
    /// Not TOML, a wrong type, or an unknown key. The message names the key and the line.
    #[error("{0}")]
    Parse(String),
    /// Well-formed TOML with a value the service cannot serve.
    #[error("{field}: {message}")]
    Invalid {
        /// Dotted path of the offending key (`slices.home.lambda`).
        field: String,
        /// What is wrong and what is allowed.
        message: String,
    },
}

pub(super) fn invalid(field: impl Into<String>, message: impl Into<String>) -> ConfigError {
    ConfigError::Invalid { field: field.into(), message: message.into() }
}
