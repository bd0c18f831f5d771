//! The configuration file (TOML): what to make and how to write it.
//!
//! In: the text of a TOML file, or nothing (every key has a default that
//! serves a typical forecast office). Out: a validated [`Config`], or every
//! problem at once, each naming its key. Unknown keys are errors.

use std::path::Path;

use serde::{Deserialize, Serialize};
use thiserror::Error;

/// A configuration problem, naming the key.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum ConfigError {
    /// File unreadable.
    #[error("cannot read config {path}: {reason}")]
    Read {
        /// Path given.
        path: String,
        /// The system's words.
        reason: String,
    },
    /// Not TOML or not our keys.
    #[error("config {path}: {reason}")]
    Parse {
        /// Path given.
        path: String,
        /// The parser's words (it names the key and line).
        reason: String,
    },
    /// Values that parse but do not make sense.
    #[error("config {path}: {}", .problems.join("; "))]
    Invalid {
        /// Path given.
        path: String,
        /// One entry per bad key: "key: reason".
        problems: Vec<String>,
    },
}

/// The whole configuration.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(deny_unknown_fields, default)]
pub struct Config {
    /// Which products to make.
    pub products: Products,
    /// How to write them.
    pub output: Output,
}

/// Product switches.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Products {
    /// Relative and absolute vorticity on isobaric levels (`zeta`, `eta`).
    pub vorticity: bool,
    /// Potential temperature, -dtheta/dp and N^2 on isobaric levels (`theta`, `stab`, `n2`).
    pub stability: bool,
    /// Mask isobaric levels below the ground where surface pressure or orography is in the input.
    pub mask_below_ground: bool,
}

impl Default for Products {
    fn default() -> Self {
        Products {
            vorticity: true,
            stability: true,
            mask_below_ground: true,
        }
    }
}

/// Output settings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Output {
    /// zlib deflate level for data variables, 0 (none) to 9; shuffle is always on when > 0.
    pub deflate_level: i32,
    /// Mantissa bits kept in data values, 1 to 23 (23: exact float32). Fewer bits
    /// compress better and faster; 16 keeps a relative precision of 7.6e-6.
    pub significant_bits: u32,
}

impl Default for Output {
    fn default() -> Self {
        Output {
            deflate_level: 1,
            significant_bits: 16,
        }
    }
}

impl Config {
    /// Parse and validate TOML text; `origin` names it in messages.
    pub fn from_toml(text: &str, origin: &str) -> Result<Config, ConfigError> {
        let cfg: Config = toml::from_str(text).map_err(|e| ConfigError::Parse {
            path: origin.to_string(),
            reason: e.to_string(),
        })?;
        let problems = cfg.problems();
        if problems.is_empty() {
            Ok(cfg)
        } else {
            Err(ConfigError::Invalid {
                path: origin.to_string(),
                problems,
            })
        }
    }

    /// Read, parse and validate a file.
    pub fn load(path: &Path) -> Result<Config, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|e| ConfigError::Read {
            path: path.display().to_string(),
            reason: e.to_string(),
        })?;
        Config::from_toml(&text, &path.display().to_string())
    }

    /// Every problem with the values, as "key: reason".
    pub fn problems(&self) -> Vec<String> {
        let mut p = Vec::new();
        if !(0..=9).contains(&self.output.deflate_level) {
            p.push(format!(
                "output.deflate_level: {} is outside 0 to 9",
                self.output.deflate_level
            ));
        }
        if !(1..=23).contains(&self.output.significant_bits) {
            p.push(format!(
                "output.significant_bits: {} is outside 1 to 23",
                self.output.significant_bits
            ));
        }
        if !self.products.vorticity && !self.products.stability {
            p.push("products: every product is switched off; nothing would be made".into());
        }
        p
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_and_every_problem_at_once() {
        assert_eq!(Config::from_toml("", "t").ok(), Some(Config::default()));
        let bad =
            "[products]\nvorticity = false\nstability = false\n[output]\ndeflate_level = 12\n";
        match Config::from_toml(bad, "t") {
            Err(ConfigError::Invalid { problems, .. }) => {
                assert_eq!(problems.len(), 2);
                assert!(problems[0].starts_with("output.deflate_level"));
            }
            other => panic!("expected two problems, got {other:?}"),
        }
        let unknown = "[output]\ndeflate = 3\n";
        assert!(matches!(
            Config::from_toml(unknown, "t"),
            Err(ConfigError::Parse { .. })
        ));
    }
}
