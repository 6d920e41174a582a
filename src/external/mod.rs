//! External segment metrics: per-segment numbers a producer computed itself (a quality-estimation
//! model, a learned metric) and sends with its items, aggregated here with the same exact,
//! additive integer statistics as the built-in metrics.
//!
//! Pure and synchronous like the scoring core: no I/O, no async.
//!
//! # Declaration
//! A session declares each external metric it accepts ([`ExternalSpec`]): a name (a Prometheus
//! label name, since it becomes the `metric` label), the range `low..=high` a value must fall in,
//! whether higher values are better, and the number of decimals kept
//! ([`DEFAULT_DECIMALS`] unless given).
//!
//! # Fixed point
//! A value is kept as the integer `value x 10^decimals`, rounded half to even. The value taken is
//! the shortest decimal numeral that reads back as the same double (what Rust's `Display` and
//! Python's `repr` print), so a value written `0.1234565` in a producer's file is the decimal
//! 0.1234565 and rounds to 0.123456 at six decimals, whatever binary neighbour the double holds.
//! The rounding is exact (integer arithmetic on that numeral's digits), so every process derives
//! the same integer from the same double.
//!
//! # Statistics
//! Per metric: the count of values, their fixed-point sum and the sum of their squares
//! ([`ExternalSums`], i128, checked). Sums over any split of the items add up to one pass over
//! all of them exactly; the mean is `sum / (count x 10^decimals)` and the sample variance
//! `(squares - sum^2 / count) / (count - 1) / 10^(2 decimals)`, derived when read.
//!
//! # Rejection
//! An item whose values break a rule (an undeclared name, NaN or infinity, a value outside the
//! declared range, more values than [`MAX_EXTERNAL_METRICS`]) is rejected as a whole with a
//! reason naming the metric ([`ValueError`]); nothing is counted from it.

pub mod compare;
pub mod replicates;
pub mod window;

use std::fmt;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

/// Decimals kept of an external value unless declared.
pub const DEFAULT_DECIMALS: u32 = 6;
/// Most decimals a declaration may keep.
pub const MAX_DECIMALS: u32 = 12;
/// Most external metrics a session may declare (and so an item may carry).
pub const MAX_EXTERNAL_METRICS: usize = 16;
/// Longest external metric name.
pub const MAX_EXTERNAL_NAME_LEN: usize = 64;
/// Largest magnitude of a fixed-point value (`max(|low|, |high|) x 10^decimals`): 10^15 keeps a
/// value in an i64 with room, its square below 10^30, so the i128 sum of squares holds at least
/// 10^8 values at the extreme and about 10^26 on a 0-1 scale with six decimals.
pub const MAX_FIXED_MAGNITUDE: i128 = 1_000_000_000_000_000;

/// One external metric a session accepts.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ExternalSpec {
    /// A Prometheus label name: `[a-zA-Z_][a-zA-Z0-9_]*`, not starting with `__`.
    pub name: String,
    /// Smallest accepted value (inclusive).
    pub low: f64,
    /// Largest accepted value (inclusive).
    pub high: f64,
    /// Whether higher values mean better translations.
    pub higher_is_better: bool,
    /// Decimals kept in the fixed-point sums.
    pub decimals: u32,
}

/// Why a declaration is not acceptable.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum SpecError {
    /// The name is not a Prometheus label name or is too long.
    #[error("external metric name '{0}' is not valid: use 1 to {MAX_EXTERNAL_NAME_LEN} characters of [a-zA-Z_][a-zA-Z0-9_]*, not starting with '__'")]
    BadName(String),
    /// Bounds that are not finite or not increasing.
    #[error("external metric '{name}': the range {low}..{high} is not valid: both finite, low below high")]
    BadRange {
        /// The metric.
        name: String,
        /// Declared low.
        low: f64,
        /// Declared high.
        high: f64,
    },
    /// Too many decimals.
    #[error("external metric '{name}': {decimals} decimals; at most {MAX_DECIMALS}")]
    TooManyDecimals {
        /// The metric.
        name: String,
        /// Declared decimals.
        decimals: u32,
    },
    /// The range times 10^decimals is too large for exact sums.
    #[error("external metric '{name}': the range times 10^{decimals} exceeds {MAX_FIXED_MAGNITUDE}; keep fewer decimals or narrow the range")]
    RangeTooWide {
        /// The metric.
        name: String,
        /// Declared decimals.
        decimals: u32,
    },
    /// The same name twice.
    #[error("external metric '{0}' is declared twice")]
    Duplicate(String),
    /// More metrics than [`MAX_EXTERNAL_METRICS`].
    #[error("{0} external metrics declared; at most {MAX_EXTERNAL_METRICS}")]
    TooMany(usize),
    /// A command-line declaration that does not parse.
    #[error("external metric declaration '{given}' is not valid: {why} (write NAME:LOW:HIGH, then optionally :better=lower and :places=N)")]
    Syntax {
        /// The text as given.
        given: String,
        /// What is wrong.
        why: String,
    },
}

/// Whether `name` is an acceptable external metric name.
pub fn valid_name(name: &str) -> bool {
    let b = name.as_bytes();
    !b.is_empty()
        && b.len() <= MAX_EXTERNAL_NAME_LEN
        && (b[0].is_ascii_alphabetic() || b[0] == b'_')
        && b.iter().all(|c| c.is_ascii_alphanumeric() || *c == b'_')
        && !name.starts_with("__")
}

impl ExternalSpec {
    /// A spec with the default decimals and higher-is-better, validated.
    pub fn new(name: &str, low: f64, high: f64) -> Result<ExternalSpec, SpecError> {
        let s = ExternalSpec { name: name.to_string(), low, high, higher_is_better: true, decimals: DEFAULT_DECIMALS };
        s.validate()?;
        Ok(s)
    }

    /// Check the name, range and decimals.
    pub fn validate(&self) -> Result<(), SpecError> {
        if !valid_name(&self.name) {
            return Err(SpecError::BadName(self.name.escape_debug().to_string()));
        }
        if !(self.low.is_finite() && self.high.is_finite() && self.low < self.high) {
            return Err(SpecError::BadRange { name: self.name.clone(), low: self.low, high: self.high });
        }
        if self.decimals > MAX_DECIMALS {
            return Err(SpecError::TooManyDecimals { name: self.name.clone(), decimals: self.decimals });
        }
        let too_wide = |v: f64| match to_fixed(v, self.decimals) {
            Ok(f) => f.unsigned_abs() as i128 > MAX_FIXED_MAGNITUDE,
            Err(_) => true,
        };
        if too_wide(self.low) || too_wide(self.high) {
            return Err(SpecError::RangeTooWide { name: self.name.clone(), decimals: self.decimals });
        }
        Ok(())
    }

    /// The fixed-point scale, `10^decimals`.
    pub fn scale(&self) -> i128 {
        10i128.pow(self.decimals)
    }
}

/// The command-line syntax: `NAME:LOW:HIGH`, then optionally `:better=lower` (or
/// `:better=higher`, the default) and `:places=N` (decimals kept), in either order.
impl FromStr for ExternalSpec {
    type Err = SpecError;

    fn from_str(s: &str) -> Result<ExternalSpec, SpecError> {
        let bad = |why: &str| SpecError::Syntax { given: s.escape_debug().to_string(), why: why.to_string() };
        let parts: Vec<&str> = s.split(':').collect();
        if parts.len() < 3 {
            return Err(bad("expected NAME:LOW:HIGH"));
        }
        let num = |t: &str, what: &str| t.trim().parse::<f64>().map_err(|_| bad(&format!("{what} '{t}' is not a number")));
        let mut spec = ExternalSpec { name: parts[0].to_string(), low: num(parts[1], "LOW")?, high: num(parts[2], "HIGH")?, higher_is_better: true, decimals: DEFAULT_DECIMALS };
        let (mut seen_better, mut seen_places) = (false, false);
        for opt in &parts[3..] {
            match opt.split_once('=') {
                Some(("better", v)) if !seen_better => {
                    seen_better = true;
                    spec.higher_is_better = match v {
                        "higher" => true,
                        "lower" => false,
                        _ => return Err(bad("better= takes higher or lower")),
                    };
                }
                Some(("places", v)) if !seen_places => {
                    seen_places = true;
                    spec.decimals = v.parse().map_err(|_| bad("places= takes a whole number"))?;
                }
                _ => return Err(bad(&format!("unknown or repeated option '{opt}'"))),
            }
        }
        spec.validate()?;
        Ok(spec)
    }
}

impl fmt::Display for ExternalSpec {
    /// The command-line syntax (every option written out).
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let better = if self.higher_is_better { "higher" } else { "lower" };
        write!(f, "{}:{}:{}:better={better}:places={}", self.name, self.low, self.high, self.decimals)
    }
}

/// The external metrics of a session, in declaration order (an index into it names a metric in
/// every per-metric vector below).
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(transparent)]
pub struct Declaration {
    specs: Vec<ExternalSpec>,
}

impl Declaration {
    /// Validate every spec, unique names and the count.
    pub fn new(specs: Vec<ExternalSpec>) -> Result<Declaration, SpecError> {
        if specs.len() > MAX_EXTERNAL_METRICS {
            return Err(SpecError::TooMany(specs.len()));
        }
        for (i, s) in specs.iter().enumerate() {
            s.validate()?;
            if specs[..i].iter().any(|o| o.name == s.name) {
                return Err(SpecError::Duplicate(s.name.clone()));
            }
        }
        Ok(Declaration { specs })
    }

    /// The specs, in declaration order.
    pub fn specs(&self) -> &[ExternalSpec] {
        &self.specs
    }

    /// Number of declared metrics.
    pub fn len(&self) -> usize {
        self.specs.len()
    }

    /// Whether none is declared.
    pub fn is_empty(&self) -> bool {
        self.specs.is_empty()
    }

    /// Index of the metric called `name`.
    pub fn index(&self, name: &str) -> Option<usize> {
        self.specs.iter().position(|s| s.name == name)
    }

    /// Check an item's values and convert them to fixed point: `(metric index, fixed value)`
    /// sorted by index. Any bad value rejects the whole item.
    pub fn check_item<'a, I>(&self, values: I) -> Result<ItemValues, ValueError>
    where
        I: IntoIterator<Item = (&'a str, f64)>,
    {
        let values: Vec<(&str, f64)> = values.into_iter().take(MAX_EXTERNAL_METRICS + 1).collect();
        if values.len() > MAX_EXTERNAL_METRICS {
            return Err(ValueError::TooMany { limit: MAX_EXTERNAL_METRICS });
        }
        let mut out: Vec<(usize, i64)> = Vec::with_capacity(values.len());
        for (name, v) in values {
            let shown = || name.escape_debug().to_string();
            let Some(i) = self.index(name) else {
                return Err(ValueError::Undeclared { metric: shown() });
            };
            if out.iter().any(|&(j, _)| j == i) {
                return Err(ValueError::Duplicate { metric: shown() });
            }
            if !v.is_finite() {
                return Err(ValueError::NotFinite { metric: shown(), value: v.to_string() });
            }
            let s = &self.specs[i];
            if v < s.low || v > s.high {
                return Err(ValueError::OutOfRange { metric: shown(), value: v, low: s.low, high: s.high });
            }
            // In range of a validated spec: the fixed value fits (`MAX_FIXED_MAGNITUDE`).
            let f = to_fixed(v, s.decimals).map_err(|_| ValueError::OutOfRange { metric: shown(), value: v, low: s.low, high: s.high })?;
            out.push((i, f));
        }
        out.sort_unstable_by_key(|&(i, _)| i);
        Ok(ItemValues(out))
    }
}

/// An item's accepted external values: `(metric index, value x 10^decimals)`, by index.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct ItemValues(pub Vec<(usize, i64)>);

impl ItemValues {
    /// Whether the item carries no external value.
    pub fn is_empty(&self) -> bool {
        self.0.is_empty()
    }
}

/// Why an item's external values are rejected; each names the metric.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ValueError {
    /// A name the session does not declare.
    #[error("external metric '{metric}' is not declared by the session")]
    Undeclared {
        /// The name as given.
        metric: String,
    },
    /// NaN or an infinity.
    #[error("external metric '{metric}': {value} is not a finite number")]
    NotFinite {
        /// The metric.
        metric: String,
        /// The value as printed.
        value: String,
    },
    /// Outside the declared range.
    #[error("external metric '{metric}': {value} is outside its range {low}..{high}")]
    OutOfRange {
        /// The metric.
        metric: String,
        /// The value.
        value: f64,
        /// Declared low.
        low: f64,
        /// Declared high.
        high: f64,
    },
    /// The same metric twice in one item.
    #[error("external metric '{metric}' is given twice")]
    Duplicate {
        /// The metric.
        metric: String,
    },
    /// More values than any session may declare.
    #[error("more than {limit} external values in one item")]
    TooMany {
        /// [`MAX_EXTERNAL_METRICS`].
        limit: usize,
    },
}

impl ValueError {
    /// The metric the reason names (None for [`ValueError::TooMany`]).
    pub fn metric(&self) -> Option<&str> {
        match self {
            ValueError::Undeclared { metric } | ValueError::NotFinite { metric, .. } | ValueError::OutOfRange { metric, .. } | ValueError::Duplicate { metric } => Some(metric),
            ValueError::TooMany { .. } => None,
        }
    }
}

/// A value that cannot be put in fixed point.
#[derive(Debug, Clone, Copy, PartialEq, Eq, thiserror::Error)]
pub enum FixedError {
    /// NaN or an infinity.
    #[error("not a finite number")]
    NotFinite,
    /// Too large for an i64 after scaling.
    #[error("too large for the fixed-point scale")]
    TooLarge,
}

/// `value x 10^decimals`, rounded half to even, of the shortest decimal numeral that reads back
/// as `value` (see the module notes). Exact: integer arithmetic on the numeral's digits.
pub fn to_fixed(value: f64, decimals: u32) -> Result<i64, FixedError> {
    if !value.is_finite() {
        return Err(FixedError::NotFinite);
    }
    if value == 0.0 {
        return Ok(0);
    }
    // `{:e}` prints the shortest round-trip digits: "-1.234565e-1".
    let text = format!("{value:e}");
    let (mantissa, exp) = text.split_once('e').ok_or(FixedError::TooLarge)?;
    let exp: i64 = exp.parse().map_err(|_| FixedError::TooLarge)?;
    let negative = mantissa.starts_with('-');
    let digits: String = mantissa.chars().filter(char::is_ascii_digit).collect();
    // At most 17 significant digits: fits an i128 with room.
    let d: i128 = digits.parse().map_err(|_| FixedError::TooLarge)?;
    // value = d x 10^(exp - (len - 1)); times 10^decimals:
    let shift = exp - (digits.len() as i64 - 1) + i64::from(decimals);
    let magnitude = if shift >= 0 {
        // i64 holds below 10^19: a larger shift overflows for any d >= 1.
        if shift > 19 {
            return Err(FixedError::TooLarge);
        }
        d.checked_mul(10i128.pow(shift as u32)).ok_or(FixedError::TooLarge)?
    } else if -shift > digits.len() as i64 {
        // d < 10^len <= 10^(-shift - 1): d / 10^-shift < 1/10, rounds to 0.
        0
    } else {
        let div = 10i128.pow((-shift) as u32);
        let (q, r) = (d / div, d % div);
        let twice = 2 * r;
        if twice > div || (twice == div && q % 2 == 1) {
            q + 1
        } else {
            q
        }
    };
    let signed = if negative { -magnitude } else { magnitude };
    i64::try_from(signed).map_err(|_| FixedError::TooLarge)
}

/// Why sums cannot be added.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum SumError {
    /// An integer would overflow.
    #[error("external metric sums overflow (count {count}); reset the session or keep fewer decimals")]
    Overflow {
        /// Count of the sums that overflowed.
        count: u64,
    },
    /// Sums over different declarations (or replicate settings).
    #[error("external metric sums differ in their metrics, replicates or seed")]
    Mismatch,
}

/// Count, fixed-point sum and sum of squares of one metric's values; additive.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
pub struct ExternalSums {
    /// Values counted.
    pub count: u64,
    /// Sum of `value x 10^decimals`.
    pub sum: i128,
    /// Sum of `(value x 10^decimals)^2`.
    pub squares: i128,
}

impl ExternalSums {
    /// The sums of one value.
    pub fn one(fixed: i64) -> ExternalSums {
        let f = i128::from(fixed);
        ExternalSums { count: 1, sum: f, squares: f * f }
    }

    /// `self + o`, checked.
    pub fn checked_add(&self, o: &ExternalSums) -> Result<ExternalSums, SumError> {
        let err = || SumError::Overflow { count: self.count };
        Ok(ExternalSums {
            count: self.count.checked_add(o.count).ok_or_else(err)?,
            sum: self.sum.checked_add(o.sum).ok_or_else(err)?,
            squares: self.squares.checked_add(o.squares).ok_or_else(err)?,
        })
    }

    /// `self - o`, checked (for windows: `o` must be part of `self`).
    pub fn checked_sub(&self, o: &ExternalSums) -> Result<ExternalSums, SumError> {
        let err = || SumError::Overflow { count: self.count };
        Ok(ExternalSums {
            count: self.count.checked_sub(o.count).ok_or_else(err)?,
            sum: self.sum.checked_sub(o.sum).ok_or_else(err)?,
            squares: self.squares.checked_sub(o.squares).ok_or_else(err)?,
        })
    }

    /// The mean value (unscaled), None when empty.
    pub fn mean(&self, decimals: u32) -> Option<f64> {
        (self.count > 0).then(|| self.sum as f64 / (self.count as f64 * 10f64.powi(decimals as i32)))
    }

    /// The sample variance (n - 1 in the denominator; unscaled), None below two values.
    /// `(n squares - sum^2) / (n (n - 1))`, the numerator exact in integers when it fits.
    pub fn variance(&self, decimals: u32) -> Option<f64> {
        if self.count < 2 {
            return None;
        }
        let n = i128::from(self.count);
        let scale2 = 10f64.powi(2 * decimals as i32);
        let numerator = match n.checked_mul(self.squares).and_then(|a| self.sum.checked_mul(self.sum).and_then(|b| a.checked_sub(b))) {
            Some(x) => x as f64,
            None => {
                let (s, q, nf) = (self.sum as f64, self.squares as f64, n as f64);
                nf * q - s * s
            }
        };
        Some((numerator / (n as f64 * (n - 1) as f64)).max(0.0) / scale2)
    }
}

/// Name of the interval of a mean derived from a count, sum and sum of squares alone (history
/// steps keep no replicate sums): the normal-theory interval `mean ± t(0.975, n - 1) s / sqrt(n)`
/// (Student 1908), with the normal quantile [`Z975`] above [`T975`]'s 30 degrees of freedom.
pub const MEAN_INTERVAL_METHOD: &str = "student-t-mean";
/// Confidence level of [`ExternalSums::mean_interval`].
pub const MEAN_INTERVAL_LEVEL: f64 = 0.95;
/// Quantiles t(0.975, df) of Student's t for df = 1..=30 (NIST/SEMATECH e-Handbook of
/// Statistical Methods, table 1.3.6.7.2, three decimals).
pub const T975: [f64; 30] = [
    12.706, 4.303, 3.182, 2.776, 2.571, 2.447, 2.365, 2.306, 2.262, 2.228, 2.201, 2.179, 2.160, 2.145, 2.131, 2.120, 2.110, 2.101, 2.093, 2.086, 2.080, 2.074, 2.069, 2.064, 2.060, 2.056, 2.052, 2.048, 2.045, 2.042,
];
/// The standard normal 0.975 quantile (same handbook, table 1.3.6.7.1), used above 30 degrees
/// of freedom.
pub const Z975: f64 = 1.96;

impl ExternalSums {
    /// The [`MEAN_INTERVAL_LEVEL`] interval of the mean ([`MEAN_INTERVAL_METHOD`]), unscaled;
    /// None below two values.
    pub fn mean_interval(&self, decimals: u32) -> Option<(f64, f64)> {
        let (mean, variance) = (self.mean(decimals)?, self.variance(decimals)?);
        let df = (self.count - 1) as usize;
        let t = T975.get(df - 1).copied().unwrap_or(Z975);
        let half = t * (variance / self.count as f64).sqrt();
        Some((mean - half, mean + half))
    }
}

/// A metric's sums as Prometheus counters (which only grow and are whole numbers here): the
/// count; the sum of `(value - low) x 10^decimals` (exact); and the sum of
/// `(value - low)^2 x 10^decimals` (the exact offset sum of squares, at scale 10^(2 decimals),
/// divided by 10^decimals and rounded half to even once over the whole sum, so it grows
/// monotonically and stays far from the 64-bit limit). Offsetting by the declared low keeps
/// every term non-negative for any range. Derived from the cumulative sums, so a restarted
/// process publishes the same values. Saturates at `u64::MAX`.
///
/// Fleet mean: `low + sum / (count x 10^decimals)`; sample variance:
/// `(squares / 10^decimals - sum^2 / (count x 10^(2 decimals))) / (count - 1)`.
pub fn exported_counters(spec: &ExternalSpec, s: &ExternalSums) -> (u64, u64, u64) {
    // In range of a validated spec: `to_fixed(low)` succeeds.
    let low = i128::from(to_fixed(spec.low, spec.decimals).unwrap_or(0));
    let n = i128::from(s.count);
    let sum = s.sum.checked_sub(n.saturating_mul(low));
    // sum (x - low)^2 = squares - 2 low sum + n low^2
    let squares = low.checked_mul(2).and_then(|l2| l2.checked_mul(s.sum)).and_then(|a| s.squares.checked_sub(a)).and_then(|b| low.checked_mul(low).and_then(|ll| ll.checked_mul(n)).and_then(|c| b.checked_add(c)));
    let to_u64 = |v: Option<i128>| v.map_or(u64::MAX, |v| u64::try_from(v.max(0)).unwrap_or(u64::MAX));
    let scaled = squares.map(|q| {
        let div = spec.scale();
        let (quot, rem) = (q / div, q % div);
        match (2 * rem).cmp(&div) {
            std::cmp::Ordering::Less => quot,
            std::cmp::Ordering::Greater => quot + 1,
            std::cmp::Ordering::Equal => quot + (quot & 1),
        }
    });
    (s.count, to_u64(sum), to_u64(scaled))
}

/// Per declared metric, its sums (declaration order); additive.
#[derive(Debug, Clone, PartialEq, Eq, Default, Serialize, Deserialize)]
pub struct ExternalTotals(pub Vec<ExternalSums>);

impl ExternalTotals {
    /// Empty sums for `n` metrics.
    pub fn new(n: usize) -> ExternalTotals {
        ExternalTotals(vec![ExternalSums::default(); n])
    }

    /// Count one item's values; nothing changes on error.
    pub fn add_item(&mut self, item: &ItemValues) -> Result<(), SumError> {
        self.apply_item(item, ExternalSums::checked_add)
    }

    /// Take one item's values out (an item leaving a window); nothing changes on error.
    pub fn subtract_item(&mut self, item: &ItemValues) -> Result<(), SumError> {
        self.apply_item(item, ExternalSums::checked_sub)
    }

    fn apply_item(&mut self, item: &ItemValues, op: fn(&ExternalSums, &ExternalSums) -> Result<ExternalSums, SumError>) -> Result<(), SumError> {
        let mut next = self.0.clone();
        for &(i, f) in &item.0 {
            let slot = next.get_mut(i).ok_or(SumError::Mismatch)?;
            *slot = op(slot, &ExternalSums::one(f))?;
        }
        self.0 = next;
        Ok(())
    }

    /// Add another set of totals over the same declaration; nothing changes on overflow.
    pub fn merge(&mut self, o: &ExternalTotals) -> Result<(), SumError> {
        if o.0.len() != self.0.len() {
            return Err(SumError::Mismatch);
        }
        let next = self.0.iter().zip(&o.0).map(|(a, b)| a.checked_add(b)).collect::<Result<Vec<_>, _>>()?;
        self.0 = next;
        Ok(())
    }
}

/// What one batch's external values add to a session: totals and, when the session keeps
/// replicates, their replicate sums (computed while the batch is scored, outside any lock).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ExternalDelta {
    /// Sums per metric.
    pub totals: ExternalTotals,
    /// Replicate sums (None: the session keeps none).
    pub replicates: Option<replicates::ExternalReplicates>,
    /// The items (weight key, values), in order: what enters the `recent` window.
    pub items: Vec<(u64, ItemValues)>,
}

impl ExternalDelta {
    /// The delta of `items` (weight key, values) under a declaration of `metrics` metrics,
    /// with `resampling` (resamples, seed) when the session keeps replicates.
    pub fn of(metrics: usize, resampling: Option<(usize, u64)>, items: &[(u64, ItemValues)]) -> Result<ExternalDelta, SumError> {
        let mut totals = ExternalTotals::new(metrics);
        let mut reps = resampling.map(|(r, seed)| replicates::ExternalReplicates::new(metrics, r, seed));
        let mut weights = Vec::new();
        for (key, item) in items {
            totals.add_item(item)?;
            if let Some(r) = &mut reps {
                // Scratch sums of this batch, dropped on error.
                r.add_in_place(*key, item, &mut weights)?;
            }
        }
        Ok(ExternalDelta { totals, replicates: reps, items: items.to_vec() })
    }
}

/// A session's external statistics since creation or reset (its durable copy too).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ExternalState {
    /// Sums per metric.
    pub totals: ExternalTotals,
    /// Replicate sums (None: the session keeps none).
    pub replicates: Option<replicates::ExternalReplicates>,
}

impl ExternalState {
    /// Empty statistics for `metrics` metrics.
    pub fn new(metrics: usize, resampling: Option<(usize, u64)>) -> ExternalState {
        ExternalState { totals: ExternalTotals::new(metrics), replicates: resampling.map(|(r, seed)| replicates::ExternalReplicates::new(metrics, r, seed)) }
    }

    /// Whether a copy read back fits `metrics` metrics and `resampling`.
    pub fn fits(&self, metrics: usize, resampling: Option<(usize, u64)>) -> bool {
        self.totals.0.len() == metrics
            && match (&self.replicates, resampling) {
                (Some(r), Some((n, seed))) => r.fits(metrics, n, seed),
                (None, None) => true,
                _ => false,
            }
    }

    /// Add a batch's delta; nothing changes on error.
    pub fn add(&mut self, d: &ExternalDelta) -> Result<(), SumError> {
        let mut totals = self.totals.clone();
        totals.merge(&d.totals)?;
        let replicates = match (&self.replicates, &d.replicates) {
            (Some(mine), Some(theirs)) => {
                let mut r = mine.clone();
                r.merge(theirs)?;
                Some(r)
            }
            (None, None) => None,
            _ => return Err(SumError::Mismatch),
        };
        self.totals = totals;
        self.replicates = replicates;
        Ok(())
    }
}

#[cfg(test)]
mod tests;
