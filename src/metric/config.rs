//! The scoring configuration: everything a score depends on besides the texts. Every output
//! records it, because scores are only comparable under the same configuration.
//!
//! A configuration is a tokenizer, the caseless switch and one parameter object per metric. On
//! the command line a metric is named by a spec, `NAME[:key=value,...]`, for example
//! `bleu:order=4,smoothing=plus-one` or `chrf++:beta=1`; the same keys name the parameters in
//! JSON, in the API (with `_` for `-`) and in the one-line description.

use std::fmt;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

use super::{
    RefLength, Smoothing, DEFAULT_BLEU_ORDER, DEFAULT_CHRF_BETA, DEFAULT_CHRF_CHAR_ORDER, DEFAULT_CHRF_WORD_ORDER,
    DEFAULT_CHRFPP_WORD_ORDER, DEFAULT_EPSILON, MAX_BLEU_ORDER, MAX_CHRF_CHAR_ORDER, MAX_CHRF_WORD_ORDER,
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

    /// The name used in specs, as a JSON key, in the API and as a Prometheus label value.
    pub fn name(self) -> &'static str {
        match self {
            Metric::Bleu => "bleu",
            Metric::Chrf => "chrf",
            Metric::ChrfPlusPlus => "chrf++",
        }
    }

    /// The name as the papers write it, for human output.
    pub fn title(self) -> &'static str {
        match self {
            Metric::Bleu => "BLEU",
            Metric::Chrf => "chrF",
            Metric::ChrfPlusPlus => "chrF++",
        }
    }

    /// The parameter keys of this metric, in the order they are written.
    pub fn keys(self) -> &'static [&'static str] {
        match self {
            Metric::Bleu => &BLEU_KEYS,
            Metric::Chrf | Metric::ChrfPlusPlus => &CHRF_KEYS,
        }
    }
}

impl fmt::Display for Metric {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for Metric {
    type Err = ConfigError;
    fn from_str(s: &str) -> Result<Self, ConfigError> {
        Metric::ALL.into_iter().find(|m| m.name() == s).ok_or_else(|| ConfigError::UnknownMetric(s.to_owned()))
    }
}

/// BLEU parameter keys.
const BLEU_KEYS: [&str; 4] = ["order", "ref-length", "smoothing", "epsilon"];
/// chrF / chrF++ parameter keys.
const CHRF_KEYS: [&str; 3] = ["chars", "words", "beta"];

/// The parameters of BLEU.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct BleuParams {
    /// Largest n-gram order (1..=[`MAX_BLEU_ORDER`]).
    pub order: usize,
    /// Which reference length is the effective one for the brevity penalty.
    pub ref_length: RefLength,
    /// Sentence-level smoothing (corpus BLEU is never smoothed).
    pub smoothing: Smoothing,
    /// The epsilon of the `epsilon` smoothing.
    pub epsilon: f64,
}

impl Default for BleuParams {
    fn default() -> Self {
        BleuParams { order: DEFAULT_BLEU_ORDER, ref_length: RefLength::Closest, smoothing: Smoothing::default(), epsilon: DEFAULT_EPSILON }
    }
}

/// The parameters of chrF and chrF++ (chrF++ is chrF with word orders).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ChrfParams {
    /// Character n-gram orders 1..=chars.
    pub chars: usize,
    /// Word n-gram orders 1..=words (0: none).
    pub words: usize,
    /// The beta of F-beta: recall weighs beta times as much as precision.
    pub beta: f64,
}

impl ChrfParams {
    /// The defaults of chrF (`Metric::Chrf`) or chrF++ (`Metric::ChrfPlusPlus`).
    pub fn default_for(m: Metric) -> ChrfParams {
        let words = if m == Metric::ChrfPlusPlus { DEFAULT_CHRFPP_WORD_ORDER } else { DEFAULT_CHRF_WORD_ORDER };
        ChrfParams { chars: DEFAULT_CHRF_CHAR_ORDER, words, beta: DEFAULT_CHRF_BETA }
    }
}

/// One metric with its parameters: what `--metric SPEC` names.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum MetricSpec {
    /// BLEU.
    Bleu(BleuParams),
    /// chrF or chrF++ (the metric is never [`Metric::Bleu`]).
    Chrf(Metric, ChrfParams),
}

impl MetricSpec {
    /// The metric with its default parameters.
    pub fn default_for(m: Metric) -> MetricSpec {
        match m {
            Metric::Bleu => MetricSpec::Bleu(BleuParams::default()),
            m => MetricSpec::Chrf(m, ChrfParams::default_for(m)),
        }
    }

    /// Which metric.
    pub fn metric(&self) -> Metric {
        match self {
            MetricSpec::Bleu(_) => Metric::Bleu,
            MetricSpec::Chrf(m, _) => *m,
        }
    }

    /// Set parameter `key` from its text.
    pub fn set(&mut self, key: &str, value: &str) -> Result<(), ConfigError> {
        let m = self.metric();
        let bad = |why: String| ConfigError::BadValue { metric: m, key: key.to_owned(), why };
        let int = || value.parse::<usize>().map_err(|_| bad(format!("'{value}' is not a whole number")));
        let num = || value.parse::<f64>().map_err(|_| bad(format!("'{value}' is not a number")));
        match (self, key) {
            (MetricSpec::Bleu(p), "order") => p.order = int()?,
            (MetricSpec::Bleu(p), "ref-length") => p.ref_length = value.parse().map_err(bad)?,
            (MetricSpec::Bleu(p), "smoothing") => p.smoothing = value.parse().map_err(bad)?,
            (MetricSpec::Bleu(p), "epsilon") => p.epsilon = num()?,
            (MetricSpec::Chrf(_, p), "chars") => p.chars = int()?,
            (MetricSpec::Chrf(_, p), "words") => p.words = int()?,
            (MetricSpec::Chrf(_, p), "beta") => p.beta = num()?,
            _ => return Err(ConfigError::UnknownKey { metric: m, key: key.to_owned() }),
        }
        Ok(())
    }

    /// Check every parameter against its range; errors name the parameter as `metric:key`.
    pub fn validate(&self) -> Result<(), ConfigError> {
        let m = self.metric();
        let range = |key: &'static str, v: usize, min: usize, max: usize| {
            if (min..=max).contains(&v) {
                Ok(())
            } else {
                Err(ConfigError::OutOfRange { metric: m, key, range: format!("between {min} and {max}"), value: v.to_string() })
            }
        };
        let positive = |key: &'static str, v: f64| {
            if v.is_finite() && v > 0.0 {
                Ok(())
            } else {
                Err(ConfigError::OutOfRange { metric: m, key, range: "a positive number".into(), value: v.to_string() })
            }
        };
        match self {
            MetricSpec::Bleu(p) => {
                range("order", p.order, 1, MAX_BLEU_ORDER)?;
                positive("epsilon", p.epsilon)
            }
            MetricSpec::Chrf(m, p) => {
                range("chars", p.chars, 1, MAX_CHRF_CHAR_ORDER)?;
                let min_words = usize::from(*m == Metric::ChrfPlusPlus);
                range("words", p.words, min_words, MAX_CHRF_WORD_ORDER)?;
                positive("beta", p.beta)
            }
        }
    }
}

impl FromStr for MetricSpec {
    type Err = ConfigError;
    /// `NAME[:key=value,...]`; unnamed parameters keep their defaults.
    fn from_str(s: &str) -> Result<Self, ConfigError> {
        let (name, params) = match s.split_once(':') {
            Some((n, p)) => (n.trim(), Some(p)),
            None => (s.trim(), None),
        };
        let mut spec = MetricSpec::default_for(name.to_ascii_lowercase().parse()?);
        let mut seen: Vec<&str> = Vec::new();
        for part in params.into_iter().flat_map(|p| p.split(',')).map(str::trim).filter(|p| !p.is_empty()) {
            let metric = spec.metric();
            let (k, v) = match part.split_once('=') {
                Some((k, v)) if !v.trim().is_empty() => (k.trim(), v.trim()),
                _ => {
                    let key = part.split('=').next().unwrap_or(part).trim().to_owned();
                    return Err(if metric.keys().contains(&key.as_str()) { ConfigError::MissingValue { metric, key } } else { ConfigError::UnknownKey { metric, key } });
                }
            };
            if seen.contains(&k) {
                return Err(ConfigError::KeyTwice { metric, key: k.to_owned() });
            }
            spec.set(k, v)?;
            seen.push(k);
        }
        spec.validate()?;
        Ok(spec)
    }
}

impl fmt::Display for MetricSpec {
    /// The full spec with every parameter, in the syntax `--metric` reads.
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            MetricSpec::Bleu(p) => {
                write!(f, "bleu:order={},ref-length={},smoothing={},epsilon={}", p.order, p.ref_length, p.smoothing, p.epsilon)
            }
            MetricSpec::Chrf(m, p) => write!(f, "{m}:chars={},words={},beta={}", p.chars, p.words, p.beta),
        }
    }
}

/// A configuration value out of range or unknown.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ConfigError {
    /// A metric name that does not exist.
    #[error("unknown metric '{0}' (choose from bleu, chrf, chrf++)")]
    UnknownMetric(String),
    /// No metric named.
    #[error("no metric named (choose from bleu, chrf, chrf++)")]
    NoMetric,
    /// The same metric named twice.
    #[error("metric {0} named twice (give each metric once, with all its parameters)")]
    Duplicate(Metric),
    /// A parameter key the metric does not have.
    #[error("unknown key '{key}' for {metric} (valid keys: {})", metric.keys().join(", "))]
    UnknownKey {
        /// The metric.
        metric: Metric,
        /// What was given.
        key: String,
    },
    /// A parameter named without a value.
    #[error("{metric}:{key} needs a value ({metric}:{key}=VALUE)")]
    MissingValue {
        /// The metric.
        metric: Metric,
        /// The key.
        key: String,
    },
    /// A parameter named twice in one spec.
    #[error("{metric}:{key} given twice (name each key once)")]
    KeyTwice {
        /// The metric.
        metric: Metric,
        /// The key.
        key: String,
    },
    /// A parameter value that cannot be read.
    #[error("{metric}:{key}: {why} (valid keys: {})", metric.keys().join(", "))]
    BadValue {
        /// The metric.
        metric: Metric,
        /// The key.
        key: String,
        /// What is wrong.
        why: String,
    },
    /// A setting other than a metric's that cannot be read (tokenizer, caseless).
    #[error("{0}")]
    Setting(String),
    /// A value outside its range.
    #[error("{metric}:{key} must be {range}, got {value}")]
    OutOfRange {
        /// The metric.
        metric: Metric,
        /// The key.
        key: &'static str,
        /// The accepted range, in words.
        range: String,
        /// What was given.
        value: String,
    },
}

/// The metrics of a configuration, each with its parameters (`None`: not computed).
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Metrics {
    /// BLEU.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bleu: Option<BleuParams>,
    /// chrF.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub chrf: Option<ChrfParams>,
    /// chrF++.
    #[serde(default, rename = "chrf++", skip_serializing_if = "Option::is_none")]
    pub chrfpp: Option<ChrfParams>,
}

/// The metrics computed when none are named.
pub const DEFAULT_METRICS: [Metric; 2] = [Metric::Bleu, Metric::Chrf];

/// Everything a score depends on besides the texts.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(try_from = "ConfigWire")]
pub struct ScoreConfig {
    /// Tokenizer for BLEU (chrF works on characters and white-space words).
    pub tokenizer: Tokenizer,
    /// Both sides through the Unicode lowercase mapping before scoring (all metrics, and the
    /// source lookup of live traffic).
    pub caseless: bool,
    /// The metrics and their parameters.
    pub metrics: Metrics,
}

impl Default for ScoreConfig {
    fn default() -> Self {
        ScoreConfig::new(DEFAULT_TOKENIZER, false, DEFAULT_METRICS.map(MetricSpec::default_for)).unwrap_or_else(|_| unreachable!("the default metrics are valid"))
    }
}

impl ScoreConfig {
    /// A validated configuration of `specs` (each metric at most once; none: the defaults).
    pub fn new(tokenizer: Tokenizer, caseless: bool, specs: impl IntoIterator<Item = MetricSpec>) -> Result<ScoreConfig, ConfigError> {
        let mut metrics = Metrics::default();
        let mut any = false;
        for spec in specs {
            spec.validate()?;
            any = true;
            let slot_taken = match spec {
                MetricSpec::Bleu(p) => metrics.bleu.replace(p).is_some(),
                MetricSpec::Chrf(Metric::Chrf, p) => metrics.chrf.replace(p).is_some(),
                MetricSpec::Chrf(_, p) => metrics.chrfpp.replace(p).is_some(),
            };
            if slot_taken {
                return Err(ConfigError::Duplicate(spec.metric()));
            }
        }
        if !any {
            return ScoreConfig::new(tokenizer, caseless, DEFAULT_METRICS.map(MetricSpec::default_for));
        }
        Ok(ScoreConfig { tokenizer, caseless, metrics })
    }

    /// Check every value against its range.
    pub fn validate(&self) -> Result<(), ConfigError> {
        let mut n = 0;
        for spec in self.specs() {
            spec.validate()?;
            n += 1;
        }
        if n == 0 {
            return Err(ConfigError::NoMetric);
        }
        Ok(())
    }

    /// Whether `m` is computed.
    pub fn has(&self, m: Metric) -> bool {
        match m {
            Metric::Bleu => self.metrics.bleu.is_some(),
            Metric::Chrf => self.metrics.chrf.is_some(),
            Metric::ChrfPlusPlus => self.metrics.chrfpp.is_some(),
        }
    }

    /// The computed metrics with their parameters, in output order.
    pub fn specs(&self) -> impl Iterator<Item = MetricSpec> + '_ {
        let m = &self.metrics;
        let bleu = m.bleu.map(MetricSpec::Bleu);
        let chrf = m.chrf.map(|p| MetricSpec::Chrf(Metric::Chrf, p));
        let chrfpp = m.chrfpp.map(|p| MetricSpec::Chrf(Metric::ChrfPlusPlus, p));
        [bleu, chrf, chrfpp].into_iter().flatten()
    }

    /// The computed metrics, in output order.
    pub fn metric_list(&self) -> impl Iterator<Item = Metric> + '_ {
        self.specs().map(|s| s.metric())
    }

    /// The computed chrF-family metrics with their parameters, in output order.
    pub fn chrf_family(&self) -> impl Iterator<Item = (Metric, ChrfParams)> {
        let m = self.metrics;
        [(Metric::Chrf, m.chrf), (Metric::ChrfPlusPlus, m.chrfpp)].into_iter().filter_map(|(k, p)| p.map(|p| (k, p)))
    }

    /// The chrF-family parameters of `m`, when computed.
    pub fn chrf_params(&self, m: Metric) -> Option<ChrfParams> {
        match m {
            Metric::Chrf => self.metrics.chrf,
            Metric::ChrfPlusPlus => self.metrics.chrfpp,
            Metric::Bleu => None,
        }
    }

    /// BLEU's largest order (0 when BLEU is not computed).
    pub fn bleu_order(&self) -> usize {
        self.metrics.bleu.map_or(0, |b| b.order)
    }

    /// The largest character order over the chrF-family metrics (0: none computed).
    pub fn max_chars(&self) -> usize {
        self.chrf_family().map(|(_, p)| p.chars).max().unwrap_or(0)
    }

    /// The largest word order over the chrF-family metrics (0: no word n-grams needed).
    pub fn max_words(&self) -> usize {
        self.chrf_family().map(|(_, p)| p.words).max().unwrap_or(0)
    }

    /// Whether any chrF-family metric is computed.
    pub fn any_chrf(&self) -> bool {
        self.metrics.chrf.is_some() || self.metrics.chrfpp.is_some()
    }

    /// A one-line description, for human output, logs and the `config` label of the session
    /// info series: `tokenizer=NAME caseless=yes|no` and every metric's full spec.
    pub fn describe(&self) -> String {
        let mut parts = vec![format!("tokenizer={}", self.tokenizer), format!("caseless={}", if self.caseless { "yes" } else { "no" })];
        parts.extend(self.specs().map(|s| s.to_string()));
        parts.join(" ")
    }
}

impl FromStr for ScoreConfig {
    type Err = ConfigError;
    /// What [`ScoreConfig::describe`] writes: white-space separated `tokenizer=NAME`,
    /// `caseless=yes|no` and metric specs, each optional (defaults for what is missing).
    fn from_str(s: &str) -> Result<Self, ConfigError> {
        let (mut tokenizer, mut caseless, mut specs) = (DEFAULT_TOKENIZER, false, Vec::new());
        for part in s.split_whitespace() {
            if let Some(t) = part.strip_prefix("tokenizer=") {
                tokenizer = t.parse().map_err(|e: crate::text::UnknownTokenizer| ConfigError::Setting(e.to_string()))?;
            } else if let Some(c) = part.strip_prefix("caseless=") {
                caseless = match c {
                    "yes" => true,
                    "no" => false,
                    _ => return Err(ConfigError::Setting(format!("caseless must be yes or no, got '{c}'"))),
                };
            } else {
                specs.push(part.parse::<MetricSpec>()?);
            }
        }
        ScoreConfig::new(tokenizer, caseless, specs)
    }
}

/// What a stored or sent configuration may look like: the current shape, or the flat shape of
/// mtgauge 0.1 stores (read-time alias, so a data dir written before the rename still loads).
#[derive(Deserialize)]
#[serde(untagged)]
enum ConfigWire {
    Current {
        tokenizer: Tokenizer,
        caseless: bool,
        metrics: Metrics,
    },
    Flat(FlatConfig),
}

/// The configuration as the first stores wrote it.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct FlatConfig {
    metrics: Vec<String>,
    tokenizer: Tokenizer,
    lowercase: bool,
    bleu_order: usize,
    ref_length: RefLength,
    smoothing: Smoothing,
    epsilon: f64,
    chrf_char_order: usize,
    chrf_word_order: usize,
    beta: f64,
}

impl TryFrom<ConfigWire> for ScoreConfig {
    type Error = ConfigError;
    fn try_from(w: ConfigWire) -> Result<ScoreConfig, ConfigError> {
        let c = match w {
            ConfigWire::Current { tokenizer, caseless, metrics } => ScoreConfig { tokenizer, caseless, metrics },
            ConfigWire::Flat(f) => {
                let bleu = BleuParams { order: f.bleu_order, ref_length: f.ref_length, smoothing: f.smoothing, epsilon: f.epsilon };
                let chrf = |m| ChrfParams { chars: f.chrf_char_order, words: if m == Metric::Chrf { 0 } else { f.chrf_word_order }, beta: f.beta };
                let mut specs = Vec::new();
                for name in &f.metrics {
                    specs.push(match name.parse::<Metric>()? {
                        Metric::Bleu => MetricSpec::Bleu(bleu),
                        m => MetricSpec::Chrf(m, chrf(m)),
                    });
                }
                if specs.is_empty() {
                    return Err(ConfigError::NoMetric);
                }
                ScoreConfig::new(f.tokenizer, f.lowercase, specs)?
            }
        };
        c.validate()?;
        Ok(c)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn specs_parse_with_defaults_and_keys() {
        assert_eq!("bleu".parse::<MetricSpec>().unwrap(), MetricSpec::Bleu(BleuParams::default()));
        let s: MetricSpec = "bleu:order=3,smoothing=plus-one, epsilon=0.5".parse().unwrap();
        assert_eq!(s, MetricSpec::Bleu(BleuParams { order: 3, smoothing: Smoothing::PlusOne, epsilon: 0.5, ..Default::default() }));
        let s: MetricSpec = "chrf++:beta=1".parse().unwrap();
        assert_eq!(s, MetricSpec::Chrf(Metric::ChrfPlusPlus, ChrfParams { chars: 6, words: 2, beta: 1.0 }));
        assert_eq!("chrf".parse::<MetricSpec>().unwrap(), MetricSpec::Chrf(Metric::Chrf, ChrfParams { chars: 6, words: 0, beta: 2.0 }));
        // The full spec reads back to itself.
        for text in ["bleu:order=2,ref-length=shortest", "chrf:chars=4,words=1", "chrf++:words=3,beta=0.5"] {
            let s: MetricSpec = text.parse().unwrap();
            assert_eq!(s.to_string().parse::<MetricSpec>().unwrap(), s);
        }
    }

    #[test]
    fn bad_specs_name_the_valid_keys() {
        let e = "bleu:chars=3".parse::<MetricSpec>().unwrap_err().to_string();
        assert_eq!(e, "unknown key 'chars' for bleu (valid keys: order, ref-length, smoothing, epsilon)");
        let e = "chrf:order=3".parse::<MetricSpec>().unwrap_err().to_string();
        assert_eq!(e, "unknown key 'order' for chrf (valid keys: chars, words, beta)");
        let e = "bleu:order=x".parse::<MetricSpec>().unwrap_err().to_string();
        assert!(e.starts_with("bleu:order: 'x' is not a whole number (valid keys: order,"), "{e}");
        assert_eq!("bleu:order=0".parse::<MetricSpec>().unwrap_err().to_string(), "bleu:order must be between 1 and 8, got 0");
        assert_eq!("chrf++:words=0".parse::<MetricSpec>().unwrap_err().to_string(), "chrf++:words must be between 1 and 4, got 0");
        assert!("chrf:beta=-1".parse::<MetricSpec>().unwrap_err().to_string().contains("chrf:beta must be a positive number"));
        assert!("ter".parse::<MetricSpec>().unwrap_err().to_string().contains("unknown metric 'ter'"));
        assert_eq!("bleu:order".parse::<MetricSpec>().unwrap_err().to_string(), "bleu:order needs a value (bleu:order=VALUE)");
        assert_eq!("bleu:order=".parse::<MetricSpec>().unwrap_err().to_string(), "bleu:order needs a value (bleu:order=VALUE)");
        assert!("bleu:nope".parse::<MetricSpec>().unwrap_err().to_string().starts_with("unknown key 'nope' for bleu"));
        assert_eq!("bleu:order=4,order=5".parse::<MetricSpec>().unwrap_err().to_string(), "bleu:order given twice (name each key once)");
    }

    #[test]
    fn configurations_refuse_duplicates_and_default_to_bleu_and_chrf() {
        let c = ScoreConfig::default();
        assert_eq!(c.metric_list().collect::<Vec<_>>(), [Metric::Bleu, Metric::Chrf]);
        assert_eq!(ScoreConfig::new(DEFAULT_TOKENIZER, false, []).unwrap(), c);
        let twice = ["bleu".parse().unwrap(), "bleu:order=2".parse().unwrap()];
        assert_eq!(ScoreConfig::new(DEFAULT_TOKENIZER, false, twice).unwrap_err(), ConfigError::Duplicate(Metric::Bleu));
        assert_eq!(
            c.describe(),
            "tokenizer=nist caseless=no bleu:order=4,ref-length=closest,smoothing=epsilon,epsilon=0.1 chrf:chars=6,words=0,beta=2"
        );
        // The description reads back to the configuration.
        let odd: ScoreConfig = "tokenizer=cjk caseless=yes chrf++:words=1 bleu:order=2".parse().unwrap();
        assert_eq!(odd.describe().parse::<ScoreConfig>().unwrap(), odd);
        assert_eq!(odd.metric_list().collect::<Vec<_>>(), [Metric::Bleu, Metric::ChrfPlusPlus]);
        assert!("tokenizer=nope".parse::<ScoreConfig>().unwrap_err().to_string().contains("unknown tokenizer 'nope'"));
        assert!("caseless=maybe".parse::<ScoreConfig>().is_err());
    }

    #[test]
    fn config_round_trips_through_json_with_one_object_per_metric() {
        let specs = ["chrf++:chars=5".parse().unwrap(), "bleu:epsilon=0.05".parse().unwrap()];
        let c = ScoreConfig::new(Tokenizer::Whitespace, true, specs).unwrap();
        let j = serde_json::to_value(c).unwrap();
        assert_eq!(
            j,
            serde_json::json!({"tokenizer": "whitespace", "caseless": true, "metrics": {
                "bleu": {"order": 4, "ref-length": "closest", "smoothing": "epsilon", "epsilon": 0.05},
                "chrf++": {"chars": 5, "words": 2, "beta": 2.0}}})
        );
        assert_eq!(serde_json::from_value::<ScoreConfig>(j).unwrap(), c);
    }

    #[test]
    fn flat_configurations_of_old_stores_still_load() {
        // The shape mtgauge 0.1 wrote into its store before the interface was renamed.
        let old = r#"{"metrics":["bleu","chrf++"],"tokenizer":"whitespace","lowercase":true,"bleu_order":3,
            "ref_length":"shortest","smoothing":"plus-one","epsilon":0.05,"chrf_char_order":5,"chrf_word_order":1,"beta":1.5}"#;
        let c: ScoreConfig = serde_json::from_str(old).unwrap();
        let want = ScoreConfig::new(
            Tokenizer::Whitespace,
            true,
            ["bleu:order=3,ref-length=shortest,smoothing=plus-one,epsilon=0.05".parse().unwrap(), "chrf++:chars=5,words=1,beta=1.5".parse().unwrap()],
        )
        .unwrap();
        assert_eq!(c, want);
        let bad = old.replace("\"bleu_order\":3", "\"bleu_order\":0");
        assert!(serde_json::from_str::<ScoreConfig>(&bad).is_err(), "a stored configuration is validated");
        assert!(serde_json::from_str::<ScoreConfig>(r#"{"tokenizer":"nist","caseless":false,"metrics":{}}"#).is_err(), "no metric");
    }
}
