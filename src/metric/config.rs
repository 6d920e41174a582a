//! The scoring configuration: everything a score depends on besides the texts. Every output
//! records it, because scores are only comparable under the same configuration.

use std::fmt;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

use super::{
    RefLength, Smoothing, DEFAULT_BLEU_ORDER, DEFAULT_CHRF_BETA, DEFAULT_CHRF_CHAR_ORDER, DEFAULT_CHRF_WORD_ORDER,
    DEFAULT_EPSILON, MAX_BLEU_ORDER, MAX_CHRF_CHAR_ORDER, MAX_CHRF_WORD_ORDER,
};
use crate::text::{Tokenizer, DEFAULT_TOKENIZER};

/// One metric.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Metric {
    /// BLEU.
    Bleu,
    /// chrF (character n-grams).
    Chrf,
    /// chrF++ (character and word n-grams).
    ChrfPlusPlus,
}

impl Metric {
    /// All metrics in output order.
    pub const ALL: [Metric; 3] = [Metric::Bleu, Metric::Chrf, Metric::ChrfPlusPlus];

    /// The name used on the command line, as a JSON key and as a Prometheus label value.
    pub fn name(self) -> &'static str {
        match self {
            Metric::Bleu => "bleu",
            Metric::Chrf => "chrf",
            Metric::ChrfPlusPlus => "chrf++",
        }
    }
}

impl fmt::Display for Metric {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// A set of metrics, parsed from a comma-separated list such as `bleu,chrf++`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default)]
pub struct MetricSet {
    /// BLEU requested.
    pub bleu: bool,
    /// chrF requested.
    pub chrf: bool,
    /// chrF++ requested.
    pub chrfpp: bool,
}

/// The metrics computed when none are named.
pub const DEFAULT_METRICS: MetricSet = MetricSet { bleu: true, chrf: true, chrfpp: false };

impl MetricSet {
    /// Whether `m` is in the set.
    pub fn contains(self, m: Metric) -> bool {
        match m {
            Metric::Bleu => self.bleu,
            Metric::Chrf => self.chrf,
            Metric::ChrfPlusPlus => self.chrfpp,
        }
    }

    /// The metrics of the set, in output order.
    pub fn iter(self) -> impl Iterator<Item = Metric> {
        Metric::ALL.into_iter().filter(move |m| self.contains(*m))
    }

    /// Whether any chrF variant is requested.
    pub fn any_chrf(self) -> bool {
        self.chrf || self.chrfpp
    }
}

impl fmt::Display for MetricSet {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let names: Vec<&str> = self.iter().map(Metric::name).collect();
        f.write_str(&names.join(","))
    }
}

impl FromStr for MetricSet {
    type Err = ConfigError;
    fn from_str(s: &str) -> Result<Self, ConfigError> {
        let mut set = MetricSet::default();
        for part in s.split(',').map(str::trim).filter(|p| !p.is_empty()) {
            match part.to_ascii_lowercase().as_str() {
                "bleu" => set.bleu = true,
                "chrf" => set.chrf = true,
                "chrf++" | "chrfpp" => set.chrfpp = true,
                _ => return Err(ConfigError::UnknownMetric(part.to_owned())),
            }
        }
        if set == MetricSet::default() {
            return Err(ConfigError::NoMetric);
        }
        Ok(set)
    }
}

impl Serialize for MetricSet {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_seq(self.iter().map(Metric::name))
    }
}

impl<'de> Deserialize<'de> for MetricSet {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        let names = Vec::<String>::deserialize(d)?;
        names.join(",").parse().map_err(serde::de::Error::custom)
    }
}

/// A configuration value out of range or unknown.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ConfigError {
    /// A metric name that does not exist.
    #[error("unknown metric '{0}' (choose from bleu, chrf, chrf++)")]
    UnknownMetric(String),
    /// An empty metric list.
    #[error("no metric named (choose from bleu, chrf, chrf++)")]
    NoMetric,
    /// A value outside its range.
    #[error("{name} must be {range}, got {value}")]
    OutOfRange {
        /// The option.
        name: &'static str,
        /// The accepted range, in words.
        range: String,
        /// What was given.
        value: String,
    },
}

/// Everything a score depends on besides the texts.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ScoreConfig {
    /// Metrics computed.
    pub metrics: MetricSet,
    /// Tokenizer for BLEU (chrF works on characters and white-space words).
    pub tokenizer: Tokenizer,
    /// Lowercase hypotheses and references before scoring (all metrics).
    pub lowercase: bool,
    /// BLEU max n-gram order.
    pub bleu_order: usize,
    /// BLEU effective reference length rule.
    pub ref_length: RefLength,
    /// Sentence-level BLEU smoothing (corpus BLEU is never smoothed).
    pub smoothing: Smoothing,
    /// Epsilon of the `epsilon` smoothing.
    pub epsilon: f64,
    /// chrF / chrF++ character n-gram order.
    pub chrf_char_order: usize,
    /// chrF++ word n-gram order.
    pub chrf_word_order: usize,
    /// chrF beta.
    pub beta: f64,
}

impl Default for ScoreConfig {
    fn default() -> Self {
        ScoreConfig {
            metrics: DEFAULT_METRICS,
            tokenizer: DEFAULT_TOKENIZER,
            lowercase: false,
            bleu_order: DEFAULT_BLEU_ORDER,
            ref_length: RefLength::Closest,
            smoothing: Smoothing::default(),
            epsilon: DEFAULT_EPSILON,
            chrf_char_order: DEFAULT_CHRF_CHAR_ORDER,
            chrf_word_order: DEFAULT_CHRF_WORD_ORDER,
            beta: DEFAULT_CHRF_BETA,
        }
    }
}

impl ScoreConfig {
    /// Check every value against its range.
    pub fn validate(&self) -> Result<(), ConfigError> {
        let range = |name: &'static str, v: usize, max: usize| {
            if (1..=max).contains(&v) {
                Ok(())
            } else {
                Err(ConfigError::OutOfRange { name, range: format!("between 1 and {max}"), value: v.to_string() })
            }
        };
        range("bleu order", self.bleu_order, MAX_BLEU_ORDER)?;
        range("chrF character order", self.chrf_char_order, MAX_CHRF_CHAR_ORDER)?;
        range("chrF++ word order", self.chrf_word_order, MAX_CHRF_WORD_ORDER)?;
        if !(self.beta.is_finite() && self.beta > 0.0) {
            return Err(ConfigError::OutOfRange {
                name: "chrF beta",
                range: "a positive number".into(),
                value: self.beta.to_string(),
            });
        }
        if !(self.epsilon.is_finite() && self.epsilon > 0.0) {
            return Err(ConfigError::OutOfRange {
                name: "smoothing epsilon",
                range: "a positive number".into(),
                value: self.epsilon.to_string(),
            });
        }
        if self.metrics == MetricSet::default() {
            return Err(ConfigError::NoMetric);
        }
        Ok(())
    }

    /// A one-line description of the configuration, for human output and logs.
    pub fn describe(&self) -> String {
        let mut parts = vec![format!("metrics={}", self.metrics), format!("tokenizer={}", self.tokenizer)];
        parts.push(format!("lowercase={}", if self.lowercase { "yes" } else { "no" }));
        if self.metrics.bleu {
            parts.push(format!("bleu-order={}", self.bleu_order));
            parts.push(format!("ref-length={}", self.ref_length));
            parts.push(format!("sentence-smoothing={}", self.smoothing));
        }
        if self.metrics.any_chrf() {
            parts.push(format!("chrf-chars={}", self.chrf_char_order));
            if self.metrics.chrfpp {
                parts.push(format!("chrf-words={}", self.chrf_word_order));
            }
            parts.push(format!("beta={}", self.beta));
        }
        parts.join(" ")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn metric_lists() {
        let s: MetricSet = "bleu, chrf++".parse().unwrap();
        assert!(s.bleu && s.chrfpp && !s.chrf);
        assert_eq!(s.to_string(), "bleu,chrf++");
        assert!("bleu,ter".parse::<MetricSet>().is_err());
        assert!(",".parse::<MetricSet>().is_err());
    }

    #[test]
    fn validation_names_the_option() {
        let c = ScoreConfig { bleu_order: 0, ..Default::default() };
        assert!(c.validate().unwrap_err().to_string().contains("bleu order"));
        let c = ScoreConfig { beta: -1.0, ..Default::default() };
        assert!(c.validate().unwrap_err().to_string().contains("beta"));
        assert!(ScoreConfig::default().validate().is_ok());
    }

    #[test]
    fn config_round_trips_through_json() {
        let c = ScoreConfig { lowercase: true, metrics: "chrf++".parse().unwrap(), ..Default::default() };
        let j = serde_json::to_string(&c).unwrap();
        assert_eq!(serde_json::from_str::<ScoreConfig>(&j).unwrap(), c);
    }
}
