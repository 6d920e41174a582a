//! Built-in demo scenario: passenger notices of the fictional coastal ferry operator
//! "Nordhavn Ferries", published in English and translated into German.
//!
//! Everything is generated deterministically from templates and slot fillers
//! (see [`super::phrases`]) with a small self-contained PRNG, so the scenario is identical on
//! every run and every platform. It backs `mtgauge demo` and many tests.
//!
//! * [`demo_segments`] gives [`DEMO_SEGMENTS`] segments, each with an English source
//!   and two differently worded German references.
//! * [`demo_systems`] gives three simulated translation systems of clearly
//!   different quality.
//! * [`degraded_hypothesis`] derives a hypothesis of a chosen quality from a segment.
//! * [`write_demo_files`] writes the scenario as line-aligned text files plus JSONL.


use std::collections::BTreeSet;
use std::io::Write as _;
use std::path::{Path, PathBuf};

use super::phrases as data;
use data::{LexEntry, Template};

use crate::refs::SegmentInput;
use crate::rng::SplitMix64;

/// Number of segments in the demo scenario.
pub const DEMO_SEGMENTS: usize = 300;

/// Number of German references per demo segment.
pub const DEMO_REFS_PER_SEGMENT: usize = 2;

/// Seed for the segment generator. Changing it changes the whole scenario.
const SEGMENT_SEED: u64 = 0x4E4F_5244_4841_564E;

/// How many times slot fillers are redrawn when a segment's source text
/// duplicates an earlier one.
const MAX_REDRAWS: usize = 64;

/// Per-token edit probability at quality 0.0; it falls linearly to 0 at quality 1.0.
const MAX_EDIT_RATE: f64 = 0.6;

/// Minimum length (in chars) of an English source word used as an untranslated leftover.
const MIN_LEFTOVER_CHARS: usize = 4;

/// Cumulative percentages choosing the edit for a word the lexicon knows:
/// drop, swap, near-synonym, English leftover (the rest).
const KNOWN_WORD_EDITS: EditThresholds = EditThresholds {
    drop: 25,
    swap: 45,
    near: 75,
};
/// Cumulative percentages for a word the lexicon does not know: drop, swap, and
/// a stray English source word for the rest (there is no near-synonym).
const UNKNOWN_WORD_EDITS: EditThresholds = EditThresholds {
    drop: 45,
    swap: 80,
    near: 80,
};
/// Range of the percentage roll.
const PERCENT: u64 = 100;
/// Shifts (minutes) applied when a system gets a clock time wrong.
const WRONG_TIME_SHIFTS: &[i32] = &[-120, -60, -30, -15, 15, 30, 60, 120];
/// Minutes per day, for wrapping shifted clock times.
const MINUTES_PER_DAY: i32 = 24 * 60;

/// Departure times are drawn on this grid (minutes).
const TIME_STEP_MINUTES: u32 = 15;
/// Earliest departure time, minutes after midnight (06:00).
const EARLIEST_DEPARTURE: u32 = 6 * 60;
/// Latest departure time, minutes after midnight (15:45).
const LATEST_DEPARTURE: u32 = 15 * 60 + 45;
/// Minutes per hour.
const MINUTES_PER_HOUR: u32 = 60;

/// Lowest and highest deck numbers.
const DECKS: (u32, u32) = (2, 8);
/// Lowest and highest vehicle lane numbers.
const LANES: (u32, u32) = (1, 12);
/// Lowest and highest gate numbers (combined with a letter).
const GATE_NUMBERS: (u32, u32) = (1, 4);
/// Lowest and highest cabin number within a deck (cabin = deck * 100 + this).
const CABIN_SUFFIX: (u32, u32) = (1, 40);
/// Lowest and highest number of free seats.
const FREE_SEATS: (u32, u32) = (12, 180);
/// Lowest and highest single fare in cents, drawn in [`FARE_STEP_CENTS`] steps.
const FARE_CENTS: (u32, u32) = (850, 3400);
/// Granularity of fares in cents.
const FARE_STEP_CENTS: u32 = 50;
/// Range of the numeric suffix of guest Wi-Fi network names.
const WIFI_SUFFIX: (u32, u32) = (10, 99);

/// Quality and seed of the good simulated system.
const GOOD_SYSTEM: (f64, u64) = (0.9, 0x0008_0001);
/// Quality and seed of the medium simulated system.
const MEDIUM_SYSTEM: (f64, u64) = (0.6, 0x0007_0001);
/// Quality and seed of the poor simulated system.
const POOR_SYSTEM: (f64, u64) = (0.3, 0x00DD_0001);

/// A simulated translation system: a name and one hypothesis per segment
/// (same order as [`demo_segments`]).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DemoSystem {
    /// Short name, safe to use in file names (`[a-z0-9-]`).
    pub name: String,
    /// One-line description.
    pub description: String,
    /// One German hypothesis per demo segment.
    pub hypotheses: Vec<String>,
}

/// FNV-1a 64-bit hash, used to turn segment ids into PRNG seeds.
fn fnv1a(bytes: &[u8]) -> u64 {
    const OFFSET_BASIS: u64 = 0xCBF2_9CE4_8422_2325;
    const PRIME: u64 = 0x0000_0100_0000_01B3;
    bytes
        .iter()
        .fold(OFFSET_BASIS, |h, &b| (h ^ u64::from(b)).wrapping_mul(PRIME))
}

/// Slot values for one segment, looked up by name while rendering a template.
#[derive(Debug, Default)]
struct Slots(Vec<(&'static str, String)>);

impl Slots {
    fn set(&mut self, key: &'static str, value: impl Into<String>) {
        self.0.push((key, value.into()));
    }

    fn get(&self, key: &str) -> &str {
        self.0
            .iter()
            .find(|(k, _)| *k == key)
            .map(|(_, v)| v.as_str())
            .unwrap_or_else(|| panic!("demo template uses unknown slot {{{key}}}"))
    }
}

/// Formats minutes after midnight as `HH:MM`.
fn clock(minutes: u32) -> String {
    format!(
        "{:02}:{:02}",
        minutes / MINUTES_PER_HOUR,
        minutes % MINUTES_PER_HOUR
    )
}

/// Formats `value / divisor` with one decimal place (or none if whole), using
/// `sep` as decimal separator.
fn decimal(value: u32, divisor: u32, sep: char, always_decimal: bool) -> String {
    let whole = value / divisor;
    let tenths = value % divisor * 10 / divisor;
    if tenths == 0 && !always_decimal {
        whole.to_string()
    } else {
        format!("{whole}{sep}{tenths}")
    }
}

/// Draws a fresh set of slot fillers. All slots are drawn every time so that the
/// random stream does not depend on the template.
fn draw_slots(rng: &mut SplitMix64) -> Slots {
    let mut s = Slots::default();

    let from = rng.index(data::PORTS.len());
    let to = (from + 1 + rng.index(data::PORTS.len() - 1)) % data::PORTS.len();
    s.set("from", data::PORTS[from]);
    s.set("to", data::PORTS[to]);

    let vessel = rng.index(data::VESSELS.len());
    let vessel2 = (vessel + 1 + rng.index(data::VESSELS.len() - 1)) % data::VESSELS.len();
    s.set("vessel", data::VESSELS[vessel]);
    s.set("vessel2", data::VESSELS[vessel2]);

    let steps = (LATEST_DEPARTURE - EARLIEST_DEPARTURE) / TIME_STEP_MINUTES;
    let time = EARLIEST_DEPARTURE + TIME_STEP_MINUTES * rng.in_range((0, steps));
    let time2 = time + rng.pick(data::LATER_OFFSET_MINUTES);
    s.set("time", clock(time));
    s.set("time2", clock(time2));

    s.set("delay", rng.pick(data::DELAY_MINUTES).to_string());
    s.set("lead", rng.pick(data::LEAD_MINUTES).to_string());

    let reason = rng.pick(data::REASONS);
    s.set("reason_en", reason.en);
    s.set("reason_gen", reason.gen);
    s.set("reason_nom", reason.nom);
    s.set("reason_is", reason.copula);

    let weather: Vec<&data::Reason> = data::REASONS.iter().filter(|r| r.weather).collect();
    let weather = *rng.pick(&weather);
    s.set("weather_en", weather.en);
    s.set("weather_gen", weather.gen);
    s.set("weather_nom", weather.nom);

    let (weekday_en, weekday_de) = *rng.pick(data::WEEKDAYS);
    s.set("weekday_en", weekday_en);
    s.set("weekday_de", weekday_de);

    let deck = rng.in_range(DECKS);
    s.set("deck", deck.to_string());
    s.set(
        "cabin",
        (rng.in_range(DECKS) * 100 + rng.in_range(CABIN_SUFFIX)).to_string(),
    );
    s.set("lane", rng.in_range(LANES).to_string());
    s.set(
        "gate",
        format!(
            "{}{}",
            rng.pick(data::GATE_LETTERS),
            rng.in_range(GATE_NUMBERS)
        ),
    );
    s.set("station", rng.pick(data::MUSTER_STATIONS).to_string());
    s.set("count", rng.in_range(FREE_SEATS).to_string());

    let height = *rng.pick(data::HEIGHT_DECIMETRES);
    s.set("height_en", decimal(height, 10, '.', true));
    s.set("height_de", decimal(height, 10, ',', true));

    let fare_steps = (FARE_CENTS.1 - FARE_CENTS.0) / FARE_STEP_CENTS;
    let fare = FARE_CENTS.0 + FARE_STEP_CENTS * rng.in_range((0, fare_steps));
    s.set("price_en", format!("{}.{:02}", fare / 100, fare % 100));
    s.set("price_de", format!("{},{:02}", fare / 100, fare % 100));

    let half_hours = *rng.pick(data::CROSSING_HALF_HOURS);
    s.set("hours_en", decimal(half_hours, 2, '.', false));
    s.set("hours_de", decimal(half_hours, 2, ',', false));

    let (item_en, item_de) = *rng.pick(data::CAFE_ITEMS);
    s.set("item_en", item_en);
    s.set("item_de", item_de);

    let (color_en, color_nom, color_acc) = *rng.pick(data::COLORS);
    s.set("color_en", color_en);
    s.set("color_nom", color_nom);
    s.set("color_acc", color_acc);

    let (side_en, side_de) = *rng.pick(data::SIDES);
    s.set("side_en", side_en);
    s.set("side_de", side_de);

    s.set("wifi", format!("NF-Guest-{}", rng.in_range(WIFI_SUFFIX)));
    s
}

/// Replaces every `{slot}` in `pattern` by its value.
///
/// # Panics
/// On an unterminated placeholder or an unknown slot name (a bug in the tables).
fn render(pattern: &str, slots: &Slots) -> String {
    let mut out = String::with_capacity(pattern.len() + 32);
    let mut rest = pattern;
    while let Some(open) = rest.find('{') {
        out.push_str(&rest[..open]);
        let after = &rest[open + 1..];
        let close = after
            .find('}')
            .unwrap_or_else(|| panic!("unterminated slot in demo template {pattern:?}"));
        out.push_str(slots.get(&after[..close]));
        rest = &after[close + 1..];
    }
    out.push_str(rest);
    out
}

/// Renders one template into (source, references).
fn render_template(template: &Template, slots: &Slots) -> (String, Vec<String>) {
    let source = render(template.en, slots);
    let refs = template.de.iter().map(|p| render(p, slots)).collect();
    (source, refs)
}

/// Template index for every segment: each template used equally often (up to one),
/// in a shuffled but fixed order.
fn template_schedule(rng: &mut SplitMix64) -> Vec<usize> {
    let mut schedule: Vec<usize> = (0..DEMO_SEGMENTS)
        .map(|i| i % data::TEMPLATES.len())
        .collect();
    // Fisher-Yates shuffle.
    for i in (1..schedule.len()).rev() {
        let j = rng.index(i + 1);
        schedule.swap(i, j);
    }
    schedule
}

/// The [`DEMO_SEGMENTS`] segments of the demo scenario, in id order.
///
/// Deterministic: every call (on every platform) returns the same segments.
/// Source texts are unique.
pub fn demo_segments() -> Vec<SegmentInput> {
    let mut rng = SplitMix64::new(SEGMENT_SEED);
    let schedule = template_schedule(&mut rng);
    let mut seen = BTreeSet::new();
    schedule
        .iter()
        .enumerate()
        .map(|(i, &t)| {
            let template = &data::TEMPLATES[t];
            let mut rendered = render_template(template, &draw_slots(&mut rng));
            for _ in 0..MAX_REDRAWS {
                if !seen.contains(&rendered.0) {
                    break;
                }
                rendered = render_template(template, &draw_slots(&mut rng));
            }
            let (source, refs) = rendered;
            seen.insert(source.clone());
            SegmentInput { id: format!("notice-{:04}", i + 1), source: Some(source), refs }
        })
        .collect()
}

/// The three simulated systems, best first: `model-v8-rc` (quality 0.9),
/// `model-v7` (0.6) and `fallback-dictionary` (0.3). Each has one hypothesis per
/// segment of [`demo_segments`], in the same order.
pub fn demo_systems() -> Vec<DemoSystem> {
    let segments = demo_segments();
    let specs: [(&str, &str, (f64, u64)); 3] = [
        (
            "model-v8-rc",
            "release candidate fine-tuned on passenger notices; rare slips",
            GOOD_SYSTEM,
        ),
        (
            "model-v7",
            "current production model; noticeable word order and terminology errors",
            MEDIUM_SYSTEM,
        ),
        (
            "fallback-dictionary",
            "word-by-word dictionary fallback used when the model service is down",
            POOR_SYSTEM,
        ),
    ];
    specs
        .iter()
        .map(|&(name, description, (quality, seed))| DemoSystem {
            name: name.to_string(),
            description: description.to_string(),
            hypotheses: segments
                .iter()
                .map(|seg| degraded_hypothesis(seg, quality, seed))
                .collect(),
        })
        .collect()
}

/// A whitespace token split into leading punctuation, a word core and trailing
/// punctuation, e.g. `„Nordlicht“,` → (`„`, `Nordlicht`, `“,`).
#[derive(Debug, Clone, PartialEq, Eq)]
struct Token {
    lead: String,
    core: String,
    trail: String,
}

impl Token {
    fn parse(word: &str) -> Self {
        let start = word
            .char_indices()
            .find(|(_, c)| c.is_alphanumeric())
            .map_or(word.len(), |(i, _)| i);
        let end = word
            .char_indices()
            .rev()
            .find(|(_, c)| c.is_alphanumeric())
            .map_or(start, |(i, c)| i + c.len_utf8())
            .max(start);
        Self {
            lead: word[..start].to_string(),
            core: word[start..end].to_string(),
            trail: word[end..].to_string(),
        }
    }

    fn render(&self) -> String {
        format!("{}{}{}", self.lead, self.core, self.trail)
    }
}

/// Cumulative percentage thresholds for [`choose_edit`].
#[derive(Debug, Clone, Copy)]
struct EditThresholds {
    drop: u64,
    swap: u64,
    near: u64,
}

/// Kinds of perturbation applied to a single word.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Edit {
    /// Leave the word out.
    Drop,
    /// Exchange the word with the next one.
    SwapWithNext,
    /// Use a near-synonym from the lexicon.
    NearSynonym,
    /// Leave an English word untranslated.
    EnglishLeftover,
    /// Change one digit of a number.
    WrongNumber,
}

fn lookup(core: &str) -> Option<&'static LexEntry> {
    data::LEXICON.iter().find(|e| e.de == core)
}

/// Chooses the edit for `tokens[i]`, falling back when the preferred edit does not
/// apply (no lexicon entry, no next word).
fn choose_edit(tokens: &[Token], i: usize, rng: &mut SplitMix64) -> Edit {
    let token = &tokens[i];
    if token.core.chars().any(|c| c.is_ascii_digit()) {
        return Edit::WrongNumber;
    }
    // Only swap inside a phrase: no punctuation between the two words.
    let can_swap = token.trail.is_empty()
        && tokens
            .get(i + 1)
            .is_some_and(|t| t.lead.is_empty() && !t.core.is_empty());
    let thresholds = if lookup(&token.core).is_some() {
        KNOWN_WORD_EDITS
    } else {
        UNKNOWN_WORD_EDITS
    };
    let roll = rng.below(PERCENT);
    if roll < thresholds.drop {
        Edit::Drop
    } else if roll < thresholds.swap {
        if can_swap {
            Edit::SwapWithNext
        } else {
            Edit::Drop
        }
    } else if roll < thresholds.near {
        Edit::NearSynonym
    } else {
        Edit::EnglishLeftover
    }
}

/// Parses an `HH:MM` clock time into minutes after midnight.
fn parse_clock(core: &str) -> Option<u32> {
    let (h, m) = core.split_once(':')?;
    if h.len() != 2 || m.len() != 2 {
        return None;
    }
    let (h, m): (u32, u32) = (h.parse().ok()?, m.parse().ok()?);
    (h < 24 && m < MINUTES_PER_HOUR).then_some(h * MINUTES_PER_HOUR + m)
}

/// Gets a number wrong: a clock time is shifted to another valid time, any other
/// number has one randomly chosen digit replaced by a different digit.
fn corrupt_number(core: &str, rng: &mut SplitMix64) -> String {
    if let Some(minutes) = parse_clock(core) {
        let shifted = (minutes as i32 + rng.pick(WRONG_TIME_SHIFTS)).rem_euclid(MINUTES_PER_DAY);
        return clock(shifted as u32);
    }
    let digit_positions: Vec<usize> = core
        .char_indices()
        .filter(|(_, c)| c.is_ascii_digit())
        .map(|(i, _)| i)
        .collect();
    let pos = *rng.pick(&digit_positions);
    let old = u64::from(core.as_bytes()[pos] - b'0');
    // A number's first digit never becomes 0 ("Deck 0", "065" look like no system output).
    let leading = pos == 0 || !core.as_bytes()[pos - 1].is_ascii_digit();
    let new = if leading && old != 0 {
        // Any of 1..=9 except `old`.
        1 + (old + rng.below(8)) % 9
    } else {
        (old + 1 + rng.below(9)) % 10
    };
    let mut out = core.to_string();
    out.replace_range(pos..=pos, &new.to_string());
    out
}

/// Hypothesis for `seg` from a simulated system of the given `quality`.
///
/// The hypothesis starts from one of the segment's references (chosen per segment)
/// and each word is perturbed with probability `MAX_EDIT_RATE * (1 - quality)`:
/// dropped, swapped with its neighbour, replaced by a near-synonym or by an
/// untranslated English word, or — for numbers — given a wrong digit.
///
/// * `quality` is clamped to `0.0..=1.0`; NaN counts as 0.0. At 1.0 the result is
///   exactly one of the references; at 0.0 roughly every other word is damaged.
/// * Deterministic in (`seed`, `seg.id`, `seg` contents, `quality`).
/// * A segment without references is perturbed from its source text instead.
pub fn degraded_hypothesis(seg: &SegmentInput, quality: f64, seed: u64) -> String {
    let quality = if quality.is_nan() {
        0.0
    } else {
        quality.clamp(0.0, 1.0)
    };
    let rate = MAX_EDIT_RATE * (1.0 - quality);
    let mut rng = SplitMix64::new(seed ^ fnv1a(seg.id.as_bytes()).rotate_left(29));
    // Burn one value so that nearby seeds do not start from correlated states.
    rng.next_u64();

    let base = if seg.refs.is_empty() {
        seg.source_text()
    } else {
        &seg.refs[rng.index(seg.refs.len())]
    };
    let mut tokens: Vec<Token> = base.split_whitespace().map(Token::parse).collect();
    // English words that could be left untranslated: not names shared with the base.
    let leftovers: Vec<String> = seg
        .source_text()
        .split_whitespace()
        .map(|w| Token::parse(w).core)
        .filter(|c| c.chars().count() >= MIN_LEFTOVER_CHARS && c.chars().all(char::is_alphabetic))
        .filter(|c| tokens.iter().all(|t| t.core != *c))
        .collect();
    let mut out: Vec<Token> = Vec::with_capacity(tokens.len());
    let mut i = 0;
    while i < tokens.len() {
        if tokens[i].core.is_empty() || !rng.chance(rate) {
            out.push(tokens[i].clone());
            i += 1;
            continue;
        }
        match choose_edit(&tokens, i, &mut rng) {
            Edit::Drop => {
                // Keep trailing punctuation (".", ";") attached to the previous word.
                if let Some(prev) = out.last_mut() {
                    let trail = tokens[i].trail.trim_start_matches(['“', '"', '»', ')']);
                    prev.trail.push_str(trail);
                }
                i += 1;
                continue;
            }
            Edit::SwapWithNext => {
                let (left, right) = tokens.split_at_mut(i + 1);
                std::mem::swap(&mut left[i].core, &mut right[0].core);
                out.push(tokens[i].clone());
                out.push(tokens[i + 1].clone());
                i += 2;
                continue;
            }
            Edit::NearSynonym => {
                if let Some(entry) = lookup(&tokens[i].core) {
                    tokens[i].core = entry.near.to_string();
                }
            }
            Edit::EnglishLeftover => {
                let replacement = match lookup(&tokens[i].core) {
                    Some(entry) => Some(entry.en.to_string()),
                    None if !leftovers.is_empty() => Some(rng.pick(&leftovers).clone()),
                    None => None,
                };
                if let Some(r) = replacement {
                    tokens[i].core = r;
                }
            }
            Edit::WrongNumber => {
                tokens[i].core = corrupt_number(&tokens[i].core, &mut rng);
            }
        }
        out.push(tokens[i].clone());
        i += 1;
    }

    let mut text = String::with_capacity(base.len());
    for (k, token) in out.iter().enumerate() {
        if k > 0 {
            text.push(' ');
        }
        text.push_str(&token.render());
    }
    text
}

/// One `refs.jsonl` line (without the newline) for `seg`: `{"id":…,"source":…,"refs":[…]}`.
fn jsonl_line(seg: &SegmentInput) -> std::io::Result<String> {
    serde_json::to_string(seg).map_err(std::io::Error::other)
}

/// Writes `lines` to `path`, each followed by `'\n'`.
fn write_lines<'a>(path: &Path, lines: impl IntoIterator<Item = &'a str>) -> std::io::Result<()> {
    let mut w = std::io::BufWriter::new(std::fs::File::create(path)?);
    for line in lines {
        w.write_all(line.as_bytes())?;
        w.write_all(b"\n")?;
    }
    w.flush()
}

/// Writes the demo scenario into `dir` (created if missing) as line-aligned UTF-8
/// text files, one line per segment in segment order:
///
/// * `source.en.txt` — English sources,
/// * `ref1.de.txt`, `ref2.de.txt` — the two German references,
/// * `hyp.<system>.de.txt` — one file per system of [`demo_systems`],
/// * `refs.jsonl` — one object per line: `{"id": …, "source": …, "refs": […]}`.
///
/// Returns the paths written, in the order above. Existing files are overwritten.
pub fn write_demo_files(dir: &Path) -> std::io::Result<Vec<PathBuf>> {
    std::fs::create_dir_all(dir)?;
    let segments = demo_segments();
    let mut written = Vec::new();

    let path = dir.join("source.en.txt");
    write_lines(&path, segments.iter().map(|s| s.source_text()))?;
    written.push(path);

    for r in 0..DEMO_REFS_PER_SEGMENT {
        let path = dir.join(format!("ref{}.de.txt", r + 1));
        write_lines(
            &path,
            segments
                .iter()
                .map(|s| s.refs.get(r).map_or("", String::as_str)),
        )?;
        written.push(path);
    }

    for system in demo_systems() {
        let path = dir.join(format!("hyp.{}.de.txt", system.name));
        write_lines(&path, system.hypotheses.iter().map(String::as_str))?;
        written.push(path);
    }

    let path = dir.join("refs.jsonl");
    let lines: Vec<String> = segments.iter().map(jsonl_line).collect::<Result<_, _>>()?;
    write_lines(&path, lines.iter().map(String::as_str))?;
    written.push(path);

    Ok(written)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::collections::BTreeMap;

    /// Whitespace tokens of `s` as a multiset.
    fn bag(s: &str) -> BTreeMap<&str, usize> {
        let mut m = BTreeMap::new();
        for w in s.split_whitespace() {
            *m.entry(w).or_insert(0) += 1;
        }
        m
    }

    /// Clipped word overlap between `hyp` and `reference`, divided by the longer
    /// length: 1.0 for identical bags of words, 0.0 for disjoint ones.
    fn overlap(hyp: &str, reference: &str) -> f64 {
        let (h, r) = (bag(hyp), bag(reference));
        let common: usize = h
            .iter()
            .map(|(w, &n)| n.min(r.get(w).copied().unwrap_or(0)))
            .sum();
        let longer = hyp
            .split_whitespace()
            .count()
            .max(reference.split_whitespace().count());
        if longer == 0 {
            1.0
        } else {
            common as f64 / longer as f64
        }
    }

    /// Best overlap of `hyp` with any reference of `seg`.
    fn best_overlap(hyp: &str, seg: &SegmentInput) -> f64 {
        seg.refs.iter().map(|r| overlap(hyp, r)).fold(0.0, f64::max)
    }

    /// Mean best overlap of hypotheses produced at `quality` with `seed`.
    fn mean_overlap(segments: &[SegmentInput], quality: f64, seed: u64) -> f64 {
        let total: f64 = segments
            .iter()
            .map(|s| best_overlap(&degraded_hypothesis(s, quality, seed), s))
            .sum();
        total / segments.len() as f64
    }

    fn mean_system_overlap(segments: &[SegmentInput], system: &DemoSystem) -> f64 {
        let total: f64 = segments
            .iter()
            .zip(&system.hypotheses)
            .map(|(s, h)| best_overlap(h, s))
            .sum();
        total / segments.len() as f64
    }

    #[test]
    fn has_the_advertised_number_of_segments() {
        assert_eq!(demo_segments().len(), DEMO_SEGMENTS);
        assert_eq!(DEMO_SEGMENTS, 300);
    }

    #[test]
    fn ids_are_unique_and_well_formed() {
        let segments = demo_segments();
        let ids: BTreeSet<&str> = segments.iter().map(|s| s.id.as_str()).collect();
        assert_eq!(ids.len(), segments.len());
        assert_eq!(segments[0].id, "notice-0001");
        assert_eq!(segments[DEMO_SEGMENTS - 1].id, "notice-0300");
        for (i, s) in segments.iter().enumerate() {
            assert_eq!(s.id, format!("notice-{:04}", i + 1));
        }
    }

    #[test]
    fn each_segment_has_two_distinct_nonempty_refs() {
        for s in demo_segments() {
            assert_eq!(s.refs.len(), DEMO_REFS_PER_SEGMENT, "{}", s.id);
            assert_ne!(s.refs[0], s.refs[1], "{}", s.id);
            assert!(!s.source_text().trim().is_empty(), "{}", s.id);
            assert!(s.refs.iter().all(|r| !r.trim().is_empty()), "{}", s.id);
        }
    }

    #[test]
    fn texts_are_single_clean_lines_without_placeholders() {
        for s in demo_segments() {
            for text in std::iter::once(s.source_text()).chain(s.refs.iter().map(String::as_str)) {
                assert!(!text.contains(['\n', '\r', '\t', '{', '}']), "{text:?}");
                assert_eq!(text.trim(), text, "{text:?}");
                assert!(!text.contains("  "), "{text:?}");
            }
        }
    }

    #[test]
    fn sources_are_unique() {
        let segments = demo_segments();
        let sources: BTreeSet<&str> = segments.iter().map(|s| s.source_text()).collect();
        assert_eq!(sources.len(), segments.len());
    }

    #[test]
    fn lengths_vary_within_the_intended_range() {
        let segments = demo_segments();
        let lengths: Vec<usize> = segments
            .iter()
            .flat_map(|s| std::iter::once(s.source_text()).chain(s.refs.iter().map(String::as_str)))
            .map(|t| t.split_whitespace().count())
            .collect();
        let min = *lengths.iter().min().unwrap();
        let max = *lengths.iter().max().unwrap();
        assert!(min >= 6, "shortest text has {min} tokens");
        assert!(max <= 35, "longest text has {max} tokens");
        assert!(max - min >= 15, "lengths do not vary enough: {min}..{max}");
    }

    #[test]
    fn every_template_renders_and_is_used() {
        let mut rng = SplitMix64::new(1);
        let slots = draw_slots(&mut rng);
        for t in data::TEMPLATES {
            let (src, refs) = render_template(t, &slots);
            assert!(!src.contains('{'));
            assert_ne!(refs[0], refs[1]);
        }
        assert!(data::TEMPLATES.len() >= 15);
        let segments = demo_segments();
        for t in data::TEMPLATES {
            let prefix: String = t.en.chars().take_while(|&c| c != '{').collect();
            assert!(
                segments.iter().any(|s| s.source_text().starts_with(&prefix)),
                "template {:?} unused",
                t.en
            );
        }
    }

    #[test]
    fn scenario_exercises_unicode_numbers_and_quotes() {
        let segments = demo_segments();
        let all_refs: String = segments
            .iter()
            .flat_map(|s| s.refs.iter().map(String::as_str))
            .collect::<Vec<_>>()
            .join(" ");
        let all_sources: String = segments
            .iter()
            .map(|s| s.source_text())
            .collect::<Vec<_>>()
            .join(" ");
        for needle in ["ß", "ä", "ö", "ü", "„", "–", ":", ","] {
            assert!(all_refs.contains(needle), "no {needle:?} in references");
        }
        assert!(all_sources.contains('"'));
        assert!(all_sources.contains(':'));
        let has_decimal_point = all_sources
            .as_bytes()
            .windows(3)
            .any(|w| w[0].is_ascii_digit() && w[1] == b'.' && w[2].is_ascii_digit());
        assert!(has_decimal_point, "no number like 2.5 in sources");
    }

    #[test]
    fn lexicon_entries_occur_in_references() {
        let segments = demo_segments();
        let cores: BTreeSet<String> = segments
            .iter()
            .flat_map(|s| &s.refs)
            .flat_map(|r| r.split_whitespace().map(|w| Token::parse(w).core))
            .collect();
        let missing: Vec<&str> = data::LEXICON
            .iter()
            .map(|e| e.de)
            .filter(|w| !cores.contains(*w))
            .collect();
        assert!(missing.is_empty(), "lexicon words never used: {missing:?}");
    }

    #[test]
    fn generation_is_deterministic() {
        assert_eq!(demo_segments(), demo_segments());
        assert_eq!(demo_systems(), demo_systems());
        let seg = &demo_segments()[17];
        assert_eq!(
            degraded_hypothesis(seg, 0.4, 99),
            degraded_hypothesis(seg, 0.4, 99)
        );
    }

    #[test]
    fn prng_matches_reference_sequence() {
        // First outputs of SplitMix64 seeded with 0, fixed to catch accidental changes.
        let mut rng = SplitMix64::new(0);
        assert_eq!(rng.next_u64(), 0xE220_A839_7B1D_CDAF);
        assert_eq!(rng.next_u64(), 0x6E78_9E6A_A1B9_65F4);
        assert_eq!(rng.next_u64(), 0x06C4_5D18_8009_454F);
    }

    #[test]
    fn systems_cover_every_segment() {
        let systems = demo_systems();
        assert_eq!(systems.len(), 3);
        let names: BTreeSet<&str> = systems.iter().map(|s| s.name.as_str()).collect();
        assert_eq!(names.len(), systems.len());
        for s in &systems {
            assert_eq!(s.hypotheses.len(), DEMO_SEGMENTS, "{}", s.name);
            assert!(s
                .name
                .chars()
                .all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '-'));
            assert!(!s.description.is_empty() && !s.description.contains('\n'));
            assert!(s.hypotheses.iter().all(|h| !h.contains('\n')));
        }
    }

    #[test]
    fn systems_have_clearly_different_quality() {
        let segments = demo_segments();
        let systems = demo_systems();
        let scores: Vec<f64> = systems
            .iter()
            .map(|s| mean_system_overlap(&segments, s))
            .collect();
        assert!(scores[0] > 0.9, "good system overlap {}", scores[0]);
        assert!(scores[0] - scores[1] > 0.1, "{scores:?}");
        assert!(scores[1] - scores[2] > 0.1, "{scores:?}");
    }

    #[test]
    fn full_quality_reproduces_a_reference() {
        for s in demo_segments() {
            let hyp = degraded_hypothesis(&s, 1.0, 7);
            assert!(s.refs.contains(&hyp), "{hyp:?}");
        }
    }

    #[test]
    fn low_quality_differs_much_more_than_high_quality() {
        let segments = demo_segments();
        let high = mean_overlap(&segments, 1.0, 3);
        let low = mean_overlap(&segments, 0.0, 3);
        assert!(high > 0.99, "high-quality overlap {high}");
        assert!(low < 0.75, "low-quality overlap {low}");
        assert!(
            low > 0.2,
            "low quality should still resemble the reference: {low}"
        );
        let changed = segments
            .iter()
            .filter(|s| !s.refs.contains(&degraded_hypothesis(s, 0.0, 3)))
            .count();
        assert!(changed * 10 >= segments.len() * 9, "only {changed} changed");
    }

    #[test]
    fn overlap_decreases_with_quality() {
        let segments = demo_segments();
        let levels = [1.0, 0.75, 0.5, 0.25, 0.0];
        let scores: Vec<f64> = levels
            .iter()
            .map(|&q| mean_overlap(&segments, q, 11))
            .collect();
        for pair in scores.windows(2) {
            assert!(pair[0] > pair[1], "{scores:?}");
        }
    }

    #[test]
    fn seeds_change_hypotheses() {
        let segments = demo_segments();
        let differing = segments
            .iter()
            .filter(|s| degraded_hypothesis(s, 0.5, 1) != degraded_hypothesis(s, 0.5, 2))
            .count();
        assert!(differing > segments.len() / 2, "only {differing} differ");
    }

    #[test]
    fn quality_is_clamped() {
        let seg = &demo_segments()[5];
        assert_eq!(
            degraded_hypothesis(seg, 2.0, 4),
            degraded_hypothesis(seg, 1.0, 4)
        );
        assert_eq!(
            degraded_hypothesis(seg, -3.0, 4),
            degraded_hypothesis(seg, 0.0, 4)
        );
        assert_eq!(
            degraded_hypothesis(seg, f64::NAN, 4),
            degraded_hypothesis(seg, 0.0, 4)
        );
    }

    #[test]
    fn segment_without_refs_uses_source() {
        let seg = SegmentInput {
            id: "x".into(),
            source: Some("Boarding at gate A1 closes at 09:15.".into()),
            refs: vec![],
        };
        assert_eq!(degraded_hypothesis(&seg, 1.0, 0), seg.source_text());
    }

    #[test]
    fn token_parse_splits_punctuation() {
        let t = Token::parse("„Nordlicht“,");
        assert_eq!(
            (t.lead.as_str(), t.core.as_str(), t.trail.as_str()),
            ("„", "Nordlicht", "“,")
        );
        assert_eq!(t.render(), "„Nordlicht“,");
        let t = Token::parse("14:30");
        assert_eq!(t.core, "14:30");
        let t = Token::parse("–");
        assert_eq!(
            (t.lead.as_str(), t.core.as_str(), t.trail.as_str()),
            ("–", "", "")
        );
    }

    #[test]
    fn corrupt_number_changes_exactly_one_digit() {
        let mut rng = SplitMix64::new(5);
        for _ in 0..100 {
            let out = corrupt_number("165", &mut rng);
            assert_eq!(out.len(), 3);
            let diffs = out
                .bytes()
                .zip("165".bytes())
                .filter(|(a, b)| a != b)
                .count();
            assert_eq!(diffs, 1, "{out}");
            assert_ne!(out.as_bytes()[0], b'0', "{out}");
        }
    }

    #[test]
    fn corrupt_number_keeps_clock_times_valid() {
        let mut rng = SplitMix64::new(6);
        for time in ["14:30", "00:15", "23:45"] {
            for _ in 0..50 {
                let out = corrupt_number(time, &mut rng);
                assert_ne!(out, time);
                assert!(parse_clock(&out).is_some(), "{time} -> {out}");
            }
        }
        assert_eq!(parse_clock("07:05"), Some(425));
        assert_eq!(parse_clock("25:00"), None);
        assert_eq!(parse_clock("7:05"), None);
    }

    #[test]
    fn writes_aligned_files_and_valid_jsonl() {
        static COUNTER: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);
        let dir = std::env::temp_dir().join(format!(
            "mtgauge-demo-test-{}-{}",
            std::process::id(),
            COUNTER.fetch_add(1, std::sync::atomic::Ordering::SeqCst)
        ));
        let written = write_demo_files(&dir).unwrap();
        let names: Vec<String> = written
            .iter()
            .map(|p| p.file_name().unwrap().to_string_lossy().into_owned())
            .collect();
        assert_eq!(
            names,
            [
                "source.en.txt",
                "ref1.de.txt",
                "ref2.de.txt",
                "hyp.model-v8-rc.de.txt",
                "hyp.model-v7.de.txt",
                "hyp.fallback-dictionary.de.txt",
                "refs.jsonl",
            ]
        );

        let segments = demo_segments();
        let systems = demo_systems();
        let read = |name: &str| std::fs::read_to_string(dir.join(name)).unwrap();
        for path in &written {
            let text = std::fs::read_to_string(path).unwrap();
            assert!(text.ends_with('\n') && !text.contains('\r'));
            assert_eq!(text.lines().count(), DEMO_SEGMENTS, "{path:?}");
        }
        let sources: Vec<String> = read("source.en.txt").lines().map(String::from).collect();
        let ref2: Vec<String> = read("ref2.de.txt").lines().map(String::from).collect();
        let hyp: Vec<String> = read("hyp.model-v7.de.txt")
            .lines()
            .map(String::from)
            .collect();
        for (i, s) in segments.iter().enumerate() {
            assert_eq!(sources[i], s.source_text());
            assert_eq!(ref2[i], s.refs[1]);
            assert_eq!(hyp[i], systems[1].hypotheses[i]);
        }

        for (line, seg) in read("refs.jsonl").lines().zip(&segments) {
            let v: serde_json::Value = serde_json::from_str(line).unwrap();
            assert_eq!(v["id"], seg.id.as_str());
            assert_eq!(v["source"], seg.source_text());
            let refs: Vec<&str> = v["refs"]
                .as_array()
                .unwrap()
                .iter()
                .map(|r| r.as_str().unwrap())
                .collect();
            assert_eq!(refs, seg.refs);
            assert!(line.starts_with("{\"id\":\"notice-"), "keys in the order id, source, refs: {line}");
        }
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
