//! The configurable limits of the server, in one table: each limit's config key, default and
//! help text. The table drives the [`Limits`] defaults, the `[limits]` section of the config
//! file, `serve --help` and the key that an error past a limit names.

use std::collections::BTreeMap;
use std::time::Duration;

/// Most items in one batch unless configured.
pub const DEFAULT_MAX_BATCH_ITEMS: usize = 10_000;
/// Longest hypothesis or source text in bytes unless configured.
pub const DEFAULT_MAX_TEXT_BYTES: usize = 64 * 1024;
/// Most sessions unless configured.
pub const DEFAULT_MAX_SESSIONS: usize = 1_000;
/// Most reference sets unless configured.
pub const DEFAULT_MAX_REFSETS: usize = 100;
/// Largest reference-set input (all files of one set) in bytes unless configured.
pub const DEFAULT_MAX_REFSET_BYTES: u64 = 2 * 1024 * 1024 * 1024;
/// Largest memory of all loaded reference sets together unless configured.
pub const DEFAULT_MAX_TOTAL_REFSET_BYTES: u64 = 8 * 1024 * 1024 * 1024;
/// Most scoring streams open at once unless configured.
pub const DEFAULT_MAX_STREAMS: usize = 1024;
/// Most watch subscribers at once unless configured.
pub const DEFAULT_MAX_WATCHERS: usize = 256;
/// Most client connections open at once on the gRPC port unless configured.
pub const DEFAULT_MAX_CONNECTIONS: usize = 1024;
/// Seconds after which a connection on which nothing was received is closed unless configured
/// (the server pings every connection several times within it, so live clients stay).
pub const DEFAULT_CONNECTION_IDLE_SECONDS: u64 = 300;

/// One configurable limit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Limit {
    /// Items in one batch.
    MaxBatchItems,
    /// Bytes of one hypothesis or source.
    MaxTextBytes,
    /// Sessions.
    MaxSessions,
    /// Reference sets.
    MaxRefsets,
    /// Input bytes of one reference set.
    MaxRefsetBytes,
    /// Memory of all reference sets.
    MaxTotalRefsetBytes,
    /// Scoring streams open at once.
    MaxStreams,
    /// Watch subscribers at once.
    MaxWatchers,
    /// Connections open at once.
    MaxConnections,
    /// Seconds of silence that close a connection.
    ConnectionIdleSeconds,
}

impl Limit {
    /// Every limit, in the order `--help` lists them.
    pub const ALL: [Limit; 10] = [
        Limit::MaxBatchItems,
        Limit::MaxTextBytes,
        Limit::MaxSessions,
        Limit::MaxRefsets,
        Limit::MaxRefsetBytes,
        Limit::MaxTotalRefsetBytes,
        Limit::MaxStreams,
        Limit::MaxWatchers,
        Limit::MaxConnections,
        Limit::ConnectionIdleSeconds,
    ];

    /// (key in the `[limits]` section, default, what it bounds).
    const fn row(self) -> (&'static str, u64, &'static str) {
        match self {
            Limit::MaxBatchItems => ("max_batch_items", DEFAULT_MAX_BATCH_ITEMS as u64, "items in one batch"),
            Limit::MaxTextBytes => ("max_text_bytes", DEFAULT_MAX_TEXT_BYTES as u64, "bytes of one hypothesis or source"),
            Limit::MaxSessions => ("max_sessions", DEFAULT_MAX_SESSIONS as u64, "sessions"),
            Limit::MaxRefsets => ("max_refsets", DEFAULT_MAX_REFSETS as u64, "reference sets"),
            Limit::MaxRefsetBytes => ("max_refset_bytes", DEFAULT_MAX_REFSET_BYTES, "input bytes of one reference set"),
            Limit::MaxTotalRefsetBytes => ("max_total_refset_bytes", DEFAULT_MAX_TOTAL_REFSET_BYTES, "memory of all reference sets"),
            Limit::MaxStreams => ("max_streams", DEFAULT_MAX_STREAMS as u64, "scoring streams open at once"),
            Limit::MaxWatchers => ("max_watchers", DEFAULT_MAX_WATCHERS as u64, "watch subscribers at once"),
            Limit::MaxConnections => ("max_connections", DEFAULT_MAX_CONNECTIONS as u64, "connections open at once; more are refused"),
            Limit::ConnectionIdleSeconds => ("connection_idle_seconds", DEFAULT_CONNECTION_IDLE_SECONDS, "seconds of silence that close a connection"),
        }
    }

    /// The key in the config file's `[limits]` section.
    pub const fn name(self) -> &'static str {
        self.row().0
    }

    /// The full config key, as errors name it: `limits.<name>`.
    pub fn key(self) -> &'static str {
        match self {
            Limit::MaxBatchItems => "limits.max_batch_items",
            Limit::MaxTextBytes => "limits.max_text_bytes",
            Limit::MaxSessions => "limits.max_sessions",
            Limit::MaxRefsets => "limits.max_refsets",
            Limit::MaxRefsetBytes => "limits.max_refset_bytes",
            Limit::MaxTotalRefsetBytes => "limits.max_total_refset_bytes",
            Limit::MaxStreams => "limits.max_streams",
            Limit::MaxWatchers => "limits.max_watchers",
            Limit::MaxConnections => "limits.max_connections",
            Limit::ConnectionIdleSeconds => "limits.connection_idle_seconds",
        }
    }

    /// The default.
    pub fn default_value(self) -> u64 {
        self.row().1
    }

    /// What it bounds.
    pub fn help(self) -> &'static str {
        self.row().2
    }
}

/// The `[limits]` keys, in table order.
pub const LIMIT_NAMES: [&str; Limit::ALL.len()] = {
    let mut names = [""; Limit::ALL.len()];
    let mut i = 0;
    while i < names.len() {
        names[i] = Limit::ALL[i].name();
        i += 1;
    }
    names
};

/// The values of a config file's `[limits]` section, keys checked against the table while the
/// file is read (so that an unknown key is reported with its place in the file).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct LimitsSection(pub BTreeMap<String, i64>);

impl<'de> serde::Deserialize<'de> for LimitsSection {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> serde::de::Visitor<'de> for V {
            type Value = LimitsSection;
            fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str("a table of limits")
            }
            fn visit_map<A: serde::de::MapAccess<'de>>(self, mut map: A) -> Result<LimitsSection, A::Error> {
                let mut out = BTreeMap::new();
                while let Some(k) = map.next_key::<String>()? {
                    if !LIMIT_NAMES.contains(&k.as_str()) {
                        return Err(serde::de::Error::unknown_field(&k, &LIMIT_NAMES));
                    }
                    let v: i64 = map.next_value()?;
                    if out.insert(k.clone(), v).is_some() {
                        return Err(serde::de::Error::duplicate_field(Limit::ALL.into_iter().find(|l| l.name() == k).map_or("", Limit::name)));
                    }
                }
                Ok(LimitsSection(out))
            }
        }
        d.deserialize_map(V)
    }
}

/// Configurable limits (config keys in parentheses in their errors).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Limits {
    /// `limits.max_batch_items`.
    pub max_batch_items: usize,
    /// `limits.max_text_bytes`.
    pub max_text_bytes: usize,
    /// `limits.max_sessions`.
    pub max_sessions: usize,
    /// `limits.max_refsets`.
    pub max_refsets: usize,
    /// `limits.max_refset_bytes`.
    pub max_refset_bytes: u64,
    /// `limits.max_total_refset_bytes`.
    pub max_total_refset_bytes: u64,
    /// `limits.max_streams`.
    pub max_streams: usize,
    /// `limits.max_watchers`.
    pub max_watchers: usize,
    /// `limits.max_connections`.
    pub max_connections: usize,
    /// `limits.connection_idle_seconds`.
    pub connection_idle: Duration,
}

impl Default for Limits {
    fn default() -> Self {
        let mut l = Limits {
            max_batch_items: 0,
            max_text_bytes: 0,
            max_sessions: 0,
            max_refsets: 0,
            max_refset_bytes: 0,
            max_total_refset_bytes: 0,
            max_streams: 0,
            max_watchers: 0,
            max_connections: 0,
            connection_idle: Duration::ZERO,
        };
        for limit in Limit::ALL {
            l.set(limit, limit.default_value());
        }
        l
    }
}

/// A `[limits]` value that is not accepted.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum LimitError {
    /// No such limit.
    #[error("unknown config key limits.{0} (known: {known})", known = Limit::ALL.map(Limit::name).join(", "))]
    Unknown(String),
    /// Zero or negative.
    #[error("config key {key} must be at least 1, got {value}")]
    TooSmall {
        /// The key.
        key: &'static str,
        /// What was given.
        value: i64,
    },
}

impl Limits {
    /// The value of `limit`.
    pub fn get(&self, limit: Limit) -> u64 {
        match limit {
            Limit::MaxBatchItems => self.max_batch_items as u64,
            Limit::MaxTextBytes => self.max_text_bytes as u64,
            Limit::MaxSessions => self.max_sessions as u64,
            Limit::MaxRefsets => self.max_refsets as u64,
            Limit::MaxRefsetBytes => self.max_refset_bytes,
            Limit::MaxTotalRefsetBytes => self.max_total_refset_bytes,
            Limit::MaxStreams => self.max_streams as u64,
            Limit::MaxWatchers => self.max_watchers as u64,
            Limit::MaxConnections => self.max_connections as u64,
            Limit::ConnectionIdleSeconds => self.connection_idle.as_secs(),
        }
    }

    /// Set `limit` to `v`.
    pub fn set(&mut self, limit: Limit, v: u64) {
        let n = usize::try_from(v).unwrap_or(usize::MAX);
        match limit {
            Limit::MaxBatchItems => self.max_batch_items = n,
            Limit::MaxTextBytes => self.max_text_bytes = n,
            Limit::MaxSessions => self.max_sessions = n,
            Limit::MaxRefsets => self.max_refsets = n,
            Limit::MaxRefsetBytes => self.max_refset_bytes = v,
            Limit::MaxTotalRefsetBytes => self.max_total_refset_bytes = v,
            Limit::MaxStreams => self.max_streams = n,
            Limit::MaxWatchers => self.max_watchers = n,
            Limit::MaxConnections => self.max_connections = n,
            Limit::ConnectionIdleSeconds => self.connection_idle = Duration::from_secs(v),
        }
    }

    /// The defaults with the values of a config file's `[limits]` section (key -> value)
    /// applied; every value must be at least 1.
    pub fn from_section(values: &BTreeMap<String, i64>) -> Result<Limits, LimitError> {
        let mut l = Limits::default();
        for (k, &v) in values {
            let limit = Limit::ALL.into_iter().find(|x| x.name() == k).ok_or_else(|| LimitError::Unknown(k.clone()))?;
            if v < 1 {
                return Err(LimitError::TooSmall { key: limit.key(), value: v });
            }
            l.set(limit, v as u64);
        }
        Ok(l)
    }

    /// Every limit with its value, keyed as in the `[limits]` section.
    pub fn section(&self) -> BTreeMap<&'static str, u64> {
        Limit::ALL.into_iter().map(|l| (l.name(), self.get(l))).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_table_drives_defaults_keys_and_parsing() {
        let d = Limits::default();
        assert_eq!((d.max_batch_items, d.connection_idle), (DEFAULT_MAX_BATCH_ITEMS, Duration::from_secs(DEFAULT_CONNECTION_IDLE_SECONDS)));
        for l in Limit::ALL {
            assert_eq!(l.key(), format!("limits.{}", l.name()));
            assert_eq!(d.get(l), l.default_value());
        }
        let section: BTreeMap<String, i64> = [("max_streams".to_owned(), 3), ("connection_idle_seconds".to_owned(), 9)].into();
        let l = Limits::from_section(&section).unwrap();
        assert_eq!((l.max_streams, l.connection_idle.as_secs(), l.max_watchers), (3, 9, DEFAULT_MAX_WATCHERS));
        assert_eq!(l.section()["max_streams"], 3);
        let zero: BTreeMap<String, i64> = [("max_sessions".to_owned(), 0)].into();
        assert_eq!(Limits::from_section(&zero).unwrap_err().to_string(), "config key limits.max_sessions must be at least 1, got 0");
        let odd: BTreeMap<String, i64> = [("max_cats".to_owned(), 5)].into();
        assert!(Limits::from_section(&odd).unwrap_err().to_string().starts_with("unknown config key limits.max_cats (known: max_batch_items, "));
    }
}
