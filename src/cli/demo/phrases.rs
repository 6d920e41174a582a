//! Static tables behind the demo scenario: notice templates, slot fillers and the
//! small German lexicon used to perturb hypotheses.
//!
//! Every text here was written for this project. The scenario is a fictional ferry
//! operator, "Nordhavn Ferries", whose ports and vessels are invented as well.
//!
//! Templates contain `{slot}` placeholders. The slot names are filled in by
//! `super::Slots`; a template that names an unknown slot is a programming error and
//! is caught by the unit tests, which render every template.

/// One passenger-notice template: an English source pattern and two German
/// phrasings, written the way two different translators would word them.
#[derive(Debug, Clone, Copy)]
pub(super) struct Template {
    /// English source pattern.
    pub en: &'static str,
    /// Two German reference patterns with different wording.
    pub de: [&'static str; 2],
}

/// All notice templates. Slots: `from`, `to` (ports), `vessel`, `vessel2`, `time`,
/// `time2` (always later than `time`), `delay`, `lead` (minutes), `reason_*`,
/// `weather_*`, `weekday_*`, `deck`, `gate`, `lane`, `cabin`, `station`, `count`,
/// `height_*`, `price_*`, `hours_*`, `item_*`, `color_*`, `side_*`, `wifi`.
pub(super) const TEMPLATES: &[Template] = &[
    // Delay with a reason.
    Template {
        en: "The {time} departure from {from} to {to} is delayed by about {delay} minutes due to {reason_en}.",
        de: [
            "Die Abfahrt um {time} Uhr von {from} nach {to} verzögert sich wegen {reason_gen} um etwa {delay} Minuten.",
            "Die Fähre von {from} nach {to} (planmäßig {time} Uhr) legt rund {delay} Minuten später ab. Grund dafür {reason_is} {reason_nom}.",
        ],
    },
    // Cancellation for a whole day.
    Template {
        en: "On {weekday_en}, all sailings between {from} and {to} are cancelled because of {reason_en}.",
        de: [
            "Am {weekday_de} fallen alle Fahrten zwischen {from} und {to} wegen {reason_gen} aus.",
            "Infolge {reason_gen} werden am {weekday_de} sämtliche Überfahrten zwischen {from} und {to} gestrichen.",
        ],
    },
    // Boarding deadline (short).
    Template {
        en: "Boarding at gate {gate} closes at {time}.",
        de: [
            "Der Einstieg an Gate {gate} endet um {time} Uhr.",
            "Gate {gate}: Boarding nur bis {time} Uhr möglich.",
        ],
    },
    // Replacement vessel.
    Template {
        en: "Today the \"{vessel}\" replaces the \"{vessel2}\" on the {time} crossing to {to}.",
        de: [
            "Heute fährt die „{vessel}“ anstelle der „{vessel2}“ um {time} Uhr nach {to}.",
            "Auf der Überfahrt nach {to} um {time} Uhr wird heute die \"{vessel}\" statt der \"{vessel2}\" eingesetzt.",
        ],
    },
    // Vehicle height limit.
    Template {
        en: "Vehicles taller than {height_en} m must use lane {lane} and report to staff before boarding.",
        de: [
            "Fahrzeuge mit einer Höhe über {height_de} m nutzen bitte Spur {lane} und melden sich vor dem Einsteigen beim Personal.",
            "Ist Ihr Fahrzeug höher als {height_de} Meter, fahren Sie bitte auf Spur {lane} und wenden Sie sich vor der Auffahrt an unser Personal.",
        ],
    },
    // Car deck closed during the crossing.
    Template {
        en: "For safety reasons, passengers may not stay on car deck {deck} during the crossing. Access reopens {lead} minutes before arrival.",
        de: [
            "Aus Sicherheitsgründen dürfen sich Passagiere während der Überfahrt nicht auf Autodeck {deck} aufhalten. Der Zugang ist erst {lead} Minuten vor der Ankunft wieder möglich.",
            "Während der Fahrt ist der Aufenthalt auf Fahrzeugdeck {deck} aus Sicherheitsgründen nicht gestattet – Zutritt wieder ab {lead} Minuten vor Ankunft.",
        ],
    },
    // Café opening hours.
    Template {
        en: "The café on deck {deck} serves {item_en} until {time2}.",
        de: [
            "Das Café auf Deck {deck} bietet bis {time2} Uhr {item_de} an.",
            "Bis {time2} Uhr gibt es im Café auf Deck {deck} {item_de}.",
        ],
    },
    // Cabin ready.
    Template {
        en: "Cabin {cabin} is ready. Keys can be collected at the information desk on deck {deck}.",
        de: [
            "Kabine {cabin} ist bezugsfertig. Die Schlüssel erhalten Sie an der Information auf Deck {deck}.",
            "Ihre Kabine {cabin} steht bereit; die Schlüsselkarte können Sie am Infoschalter auf Deck {deck} abholen.",
        ],
    },
    // Fare change.
    Template {
        en: "From {weekday_en}, a single ticket from {from} to {to} costs {price_en} euros; children under 12 travel free.",
        de: [
            "Ab {weekday_de} kostet eine einfache Fahrt von {from} nach {to} {price_de} Euro; Kinder unter 12 Jahren fahren kostenlos.",
            "Ab {weekday_de} kostet das Einzelticket {from}–{to} {price_de} €, Kinder bis 11 Jahre reisen gratis.",
        ],
    },
    // Life jackets.
    Template {
        en: "On board the \"{vessel}\", life jackets are stored under every seat and in the marked lockers on deck {deck}.",
        de: [
            "An Bord der „{vessel}“ befinden sich Rettungswesten unter jedem Sitz sowie in den gekennzeichneten Schränken auf Deck {deck}.",
            "Auf der \"{vessel}\" liegen Schwimmwesten unter allen Sitzen und in den markierten Spinden auf Deck {deck} bereit.",
        ],
    },
    // Accessibility.
    Template {
        en: "Passengers with reduced mobility can use the lift next to gate {gate}. Please contact our staff at least {lead} minutes before departure.",
        de: [
            "Fahrgäste mit eingeschränkter Mobilität können den Aufzug neben Gate {gate} benutzen. Bitte wenden Sie sich mindestens {lead} Minuten vor der Abfahrt an unser Personal.",
            "Für mobilitätseingeschränkte Reisende steht neben Gate {gate} ein Aufzug bereit. Melden Sie sich bitte spätestens {lead} Minuten vor Abfahrt bei unseren Mitarbeitenden.",
        ],
    },
    // Tide-dependent departure.
    Template {
        en: "Because of the tides, the ferry to {to} will leave at {time2} instead of {time} on {weekday_en}.",
        de: [
            "Wegen der Gezeiten legt die Fähre nach {to} am {weekday_de} um {time2} Uhr statt um {time} Uhr ab.",
            "Gezeitenbedingt verschiebt sich die Abfahrt nach {to} am {weekday_de} von {time} auf {time2} Uhr.",
        ],
    },
    // Longer crossing in bad weather.
    Template {
        en: "Due to {weather_en}, the crossing from {from} to {to} will take about {hours_en} hours today.",
        de: [
            "Wegen {weather_gen} dauert die Überfahrt von {from} nach {to} heute etwa {hours_de} Stunden.",
            "Heute ist zwischen {from} und {to} mit einer Fahrzeit von ungefähr {hours_de} Stunden zu rechnen; Ursache ist {weather_nom}.",
        ],
    },
    // Lost property.
    Template {
        en: "A {color_en} backpack was found in the lounge on deck {deck}. The owner can collect it at the information desk.",
        de: [
            "In der Lounge auf Deck {deck} wurde ein {color_nom} Rucksack gefunden. Der Besitzer kann ihn an der Information abholen.",
            "Auf Deck {deck} hat jemand in der Lounge einen {color_acc} Rucksack liegen lassen; er liegt zur Abholung an der Information bereit.",
        ],
    },
    // Arrival announcement.
    Template {
        en: "We will arrive in {to} at approximately {time2}. Drivers are asked to return to their vehicles only after the announcement.",
        de: [
            "Wir erreichen {to} voraussichtlich um {time2} Uhr. Fahrerinnen und Fahrer werden gebeten, erst nach der Durchsage zu ihren Fahrzeugen zurückzukehren.",
            "Ankunft in {to} gegen {time2} Uhr. Bitte gehen Sie erst nach der entsprechenden Durchsage zurück zu Ihrem Fahrzeug.",
        ],
    },
    // Pets.
    Template {
        en: "Dogs are allowed on deck {deck} and in the pet area near gate {gate}, but must be kept on a lead at all times.",
        de: [
            "Hunde sind auf Deck {deck} und im Tierbereich nahe Gate {gate} erlaubt, müssen aber stets angeleint sein.",
            "Auf Deck {deck} sowie im Haustierbereich bei Gate {gate} dürfen Hunde mitgenommen werden – allerdings nur an der Leine.",
        ],
    },
    // Fully booked for cars.
    Template {
        en: "The {time} sailing to {to} is fully booked for cars; {count} seats for foot passengers are still available.",
        de: [
            "Die Fahrt um {time} Uhr nach {to} ist für Pkw ausgebucht; für Fußgänger sind noch {count} Plätze frei.",
            "Für Autos ist die Abfahrt nach {to} um {time} Uhr ausgebucht, Fußpassagiere finden aber noch {count} freie Sitzplätze.",
        ],
    },
    // Smoking area.
    Template {
        en: "On the \"{vessel}\", smoking is only permitted in the marked area on the {side_en} side of deck {deck}.",
        de: [
            "Auf der „{vessel}“ ist das Rauchen nur im gekennzeichneten Bereich auf der {side_de}seite von Deck {deck} erlaubt.",
            "An Bord der \"{vessel}\" darf ausschließlich in der markierten Zone an {side_de} auf Deck {deck} geraucht werden.",
        ],
    },
    // Open decks closed in bad weather.
    Template {
        en: "Due to {weather_en}, the open decks of the \"{vessel}\" are closed until further notice. Passengers should remain seated and hold on to the handrails when walking.",
        de: [
            "Wegen {weather_gen} sind die Außendecks der „{vessel}“ bis auf Weiteres gesperrt. Bitte bleiben Sie sitzen und halten Sie sich beim Gehen an den Handläufen fest.",
            "Infolge {weather_gen} bleiben die offenen Decks der \"{vessel}\" vorerst geschlossen; Fahrgäste sollten sitzen bleiben und sich beim Gehen am Geländer festhalten.",
        ],
    },
    // New timetable.
    Template {
        en: "From {weekday_en}, the first ferry leaves {from} at {time} and the last one returns from {to} at {time2}.",
        de: [
            "Ab {weekday_de} verlässt die erste Fähre {from} um {time} Uhr, die letzte kehrt um {time2} Uhr aus {to} zurück.",
            "Neuer Fahrplan ab {weekday_de}: erste Abfahrt in {from} um {time} Uhr, letzte Rückfahrt ab {to} um {time2} Uhr.",
        ],
    },
    // Emergency instructions (long).
    Template {
        en: "In an emergency, follow the instructions of the crew, put on your life jacket and go to muster station {station} on deck {deck}; do not use the lifts.",
        de: [
            "Folgen Sie im Notfall den Anweisungen der Besatzung, legen Sie Ihre Rettungsweste an und begeben Sie sich zur Sammelstelle {station} auf Deck {deck}; benutzen Sie keine Aufzüge.",
            "Im Ernstfall gilt: Anweisungen der Crew befolgen, Schwimmweste anlegen und zum Sammelpunkt {station} auf Deck {deck} gehen. Die Aufzüge dürfen nicht benutzt werden.",
        ],
    },
    // On-board Wi-Fi.
    Template {
        en: "Free Wi-Fi is available in the lounge of the \"{vessel}\"; the network is called \"{wifi}\" and the password is printed on your ticket.",
        de: [
            "In der Lounge der „{vessel}“ gibt es kostenloses WLAN; das Netzwerk heißt „{wifi}“, das Passwort steht auf Ihrem Ticket.",
            "Gratis-WLAN in der Lounge der \"{vessel}\": Netzwerk \"{wifi}\", Passwort siehe Fahrkarte.",
        ],
    },
    // Apology.
    Template {
        en: "Nordhavn Ferries apologises for the {delay}-minute delay caused by {reason_en} and thanks you for your patience.",
        de: [
            "Nordhavn Ferries entschuldigt sich für die Verspätung von {delay} Minuten infolge {reason_gen} und dankt Ihnen für Ihre Geduld.",
            "Für die {delay}-minütige Verspätung – Grund {reason_is} {reason_nom} – bittet Nordhavn Ferries um Entschuldigung und dankt für Ihr Verständnis.",
        ],
    },
    // Documents at the gate (short).
    Template {
        en: "Please have your ticket and ID ready at gate {gate}.",
        de: [
            "Bitte halten Sie an Gate {gate} Ihr Ticket und Ihren Ausweis bereit.",
            "An Gate {gate} bitte Fahrkarte und Ausweis bereithalten.",
        ],
    },
];

/// Invented port names; identical in English and German and used without article.
pub(super) const PORTS: &[&str] = &[
    "Skarvik",
    "Lindholm",
    "Brandsund",
    "Möwenort",
    "Kalvøy",
    "Grünsiel",
    "Tarnholm",
    "Vesterhavn",
    "Süderfjord",
];

/// Invented vessel names. German treats ship names as feminine ("die „Nordlicht“").
pub(super) const VESSELS: &[&str] = &[
    "Nordlicht",
    "Seeschwalbe",
    "Silbermöwe",
    "Sturmvogel",
    "Havblik",
    "Eiderente",
    "Tümmler",
    "Graugans",
];

/// A reason for a delay or cancellation, pre-inflected for every German slot.
#[derive(Debug, Clone, Copy)]
pub(super) struct Reason {
    /// English noun phrase used after "due to" / "because of".
    pub en: &'static str,
    /// German genitive, used after "wegen" / "infolge".
    pub gen: &'static str,
    /// German nominative, used after "Grund ist".
    pub nom: &'static str,
    /// Copula agreeing with `nom` ("ist" or "sind").
    pub copula: &'static str,
    /// Whether this is a weather condition (usable in weather-only templates).
    pub weather: bool,
}

/// Delay and cancellation reasons.
pub(super) const REASONS: &[Reason] = &[
    Reason {
        en: "strong winds",
        gen: "starken Windes",
        nom: "starker Wind",
        copula: "ist",
        weather: true,
    },
    Reason {
        en: "low tide",
        gen: "Niedrigwassers",
        nom: "Niedrigwasser",
        copula: "ist",
        weather: false,
    },
    Reason {
        en: "dense fog",
        gen: "dichten Nebels",
        nom: "dichter Nebel",
        copula: "ist",
        weather: true,
    },
    Reason {
        en: "heavy swell",
        gen: "hohen Seegangs",
        nom: "hoher Seegang",
        copula: "ist",
        weather: true,
    },
    Reason {
        en: "drift ice in the harbour",
        gen: "Treibeises im Hafen",
        nom: "Treibeis im Hafen",
        copula: "ist",
        weather: true,
    },
    Reason {
        en: "a shortage of crew",
        gen: "Personalmangels",
        nom: "Personalmangel",
        copula: "ist",
        weather: false,
    },
    Reason {
        en: "urgent engine maintenance",
        gen: "dringender Wartungsarbeiten am Motor",
        nom: "dringende Wartungsarbeiten am Motor",
        copula: "sind",
        weather: false,
    },
    Reason {
        en: "a technical inspection",
        gen: "einer technischen Inspektion",
        nom: "eine technische Inspektion",
        copula: "ist",
        weather: false,
    },
    Reason {
        en: "a storm warning",
        gen: "einer Sturmwarnung",
        nom: "eine Sturmwarnung",
        copula: "ist",
        weather: false,
    },
];

/// Weekdays as (English, German).
pub(super) const WEEKDAYS: &[(&str, &str)] = &[
    ("Monday", "Montag"),
    ("Tuesday", "Dienstag"),
    ("Wednesday", "Mittwoch"),
    ("Thursday", "Donnerstag"),
    ("Friday", "Freitag"),
    ("Saturday", "Samstag"),
    ("Sunday", "Sonntag"),
];

/// Café offers as (English, German accusative).
pub(super) const CAFE_ITEMS: &[(&str, &str)] = &[
    ("fish sandwiches", "Fischbrötchen"),
    ("hot waffles", "heiße Waffeln"),
    ("vegetable soup", "Gemüsesuppe"),
    ("coffee and cake", "Kaffee und Kuchen"),
    ("gluten-free snacks", "glutenfreie Snacks"),
    ("fresh pastries", "frisches Gebäck"),
    ("hot chocolate", "heiße Schokolade"),
];

/// Colours as (English, German masculine nominative after "ein",
/// German masculine accusative after "einen").
pub(super) const COLORS: &[(&str, &str, &str)] = &[
    ("blue", "blauer", "blauen"),
    ("red", "roter", "roten"),
    ("black", "schwarzer", "schwarzen"),
    ("green", "grüner", "grünen"),
    ("grey", "grauer", "grauen"),
    ("yellow", "gelber", "gelben"),
];

/// Ship sides as (English, German nautical term).
pub(super) const SIDES: &[(&str, &str)] = &[("port", "Backbord"), ("starboard", "Steuerbord")];

/// Possible delays in minutes.
pub(super) const DELAY_MINUTES: &[u32] = &[10, 15, 20, 25, 30, 40, 45, 60, 75, 90];

/// Possible lead times (minutes before departure or arrival).
pub(super) const LEAD_MINUTES: &[u32] = &[15, 20, 30, 45];

/// Vehicle height limits in decimetres (22 = 2.2 m).
pub(super) const HEIGHT_DECIMETRES: &[u32] = &[22, 25, 28, 30, 32, 35, 40];

/// Crossing durations in half hours (5 = 2.5 hours).
pub(super) const CROSSING_HALF_HOURS: &[u32] = &[3, 4, 5, 6, 7, 9];

/// Offsets in minutes between `time` and the later `time2`.
pub(super) const LATER_OFFSET_MINUTES: &[u32] = &[45, 60, 90, 120, 150, 180, 240, 300, 360];

/// Gate letters; a gate is a letter plus a digit, e.g. "B3".
pub(super) const GATE_LETTERS: &[char] = &['A', 'B', 'C', 'D'];

/// Muster station letters.
pub(super) const MUSTER_STATIONS: &[char] = &['A', 'B', 'C', 'D', 'E', 'F'];

/// A lexicon entry used by the hypothesis perturbation.
#[derive(Debug, Clone, Copy)]
pub(super) struct LexEntry {
    /// Word as it appears in the German references.
    pub de: &'static str,
    /// A near-synonym (or plausible wrong word choice) a system might produce.
    pub near: &'static str,
    /// The untranslated English word a weak system might leave behind.
    pub en: &'static str,
}

/// Words the perturbation knows how to replace. Linear lookup; order is irrelevant.
pub(super) const LEXICON: &[LexEntry] = &[
    LexEntry {
        de: "Abfahrt",
        near: "Abreise",
        en: "departure",
    },
    LexEntry {
        de: "Fähre",
        near: "Schiff",
        en: "ferry",
    },
    LexEntry {
        de: "Überfahrt",
        near: "Reise",
        en: "crossing",
    },
    LexEntry {
        de: "Überfahrten",
        near: "Reisen",
        en: "crossings",
    },
    LexEntry {
        de: "Fahrt",
        near: "Tour",
        en: "sailing",
    },
    LexEntry {
        de: "Fahrten",
        near: "Touren",
        en: "sailings",
    },
    LexEntry {
        de: "Minuten",
        near: "min",
        en: "minutes",
    },
    LexEntry {
        de: "Stunden",
        near: "Std",
        en: "hours",
    },
    LexEntry {
        de: "Verspätung",
        near: "Verzögerung",
        en: "delay",
    },
    LexEntry {
        de: "Deck",
        near: "Etage",
        en: "deck",
    },
    LexEntry {
        de: "Fahrzeuge",
        near: "Autos",
        en: "vehicles",
    },
    LexEntry {
        de: "Fahrzeug",
        near: "Auto",
        en: "vehicle",
    },
    LexEntry {
        de: "Fahrzeugen",
        near: "Autos",
        en: "vehicles",
    },
    LexEntry {
        de: "Passagiere",
        near: "Reisende",
        en: "passengers",
    },
    LexEntry {
        de: "Fahrgäste",
        near: "Passagiere",
        en: "passengers",
    },
    LexEntry {
        de: "Personal",
        near: "Mitarbeiter",
        en: "staff",
    },
    LexEntry {
        de: "Kabine",
        near: "Zimmer",
        en: "cabin",
    },
    LexEntry {
        de: "Schlüssel",
        near: "Zugangskarten",
        en: "keys",
    },
    LexEntry {
        de: "Information",
        near: "Rezeption",
        en: "information desk",
    },
    LexEntry {
        de: "Rettungswesten",
        near: "Schwimmwesten",
        en: "life jackets",
    },
    LexEntry {
        de: "Schwimmwesten",
        near: "Rettungswesten",
        en: "life jackets",
    },
    LexEntry {
        de: "Aufzug",
        near: "Fahrstuhl",
        en: "lift",
    },
    LexEntry {
        de: "Aufzüge",
        near: "Fahrstühle",
        en: "lifts",
    },
    LexEntry {
        de: "Hunde",
        near: "Haustiere",
        en: "dogs",
    },
    LexEntry {
        de: "Ankunft",
        near: "Anlandung",
        en: "arrival",
    },
    LexEntry {
        de: "Plätze",
        near: "Sitze",
        en: "seats",
    },
    LexEntry {
        de: "gesperrt",
        near: "zu",
        en: "closed",
    },
    LexEntry {
        de: "geschlossen",
        near: "zu",
        en: "closed",
    },
    LexEntry {
        de: "heute",
        near: "jetzt",
        en: "today",
    },
    LexEntry {
        de: "Heute",
        near: "Jetzt",
        en: "Today",
    },
    LexEntry {
        de: "bitte",
        near: "freundlichst",
        en: "please",
    },
    LexEntry {
        de: "Bitte",
        near: "Freundlichst",
        en: "Please",
    },
    LexEntry {
        de: "kostet",
        near: "beträgt",
        en: "costs",
    },
    LexEntry {
        de: "Kinder",
        near: "Kids",
        en: "children",
    },
    LexEntry {
        de: "kostenlos",
        near: "umsonst",
        en: "free",
    },
    LexEntry {
        de: "gratis",
        near: "umsonst",
        en: "free",
    },
    LexEntry {
        de: "Einstieg",
        near: "Zustieg",
        en: "boarding",
    },
    LexEntry {
        de: "erlaubt",
        near: "gestattet",
        en: "allowed",
    },
    LexEntry {
        de: "gestattet",
        near: "erlaubt",
        en: "permitted",
    },
    LexEntry {
        de: "Gezeiten",
        near: "Tide",
        en: "tides",
    },
    LexEntry {
        de: "wegen",
        near: "durch",
        en: "because of",
    },
    LexEntry {
        de: "Wegen",
        near: "Durch",
        en: "Due to",
    },
    LexEntry {
        de: "infolge",
        near: "durch",
        en: "due to",
    },
    LexEntry {
        de: "Infolge",
        near: "Durch",
        en: "Because of",
    },
    LexEntry {
        de: "und",
        near: "sowie",
        en: "and",
    },
    LexEntry {
        de: "nach",
        near: "zu",
        en: "to",
    },
    LexEntry {
        de: "von",
        near: "aus",
        en: "from",
    },
    LexEntry {
        de: "um",
        near: "gegen",
        en: "at",
    },
    LexEntry {
        de: "etwa",
        near: "ungefähr",
        en: "about",
    },
    LexEntry {
        de: "rund",
        near: "circa",
        en: "around",
    },
    LexEntry {
        de: "Euro",
        near: "EUR",
        en: "euros",
    },
    LexEntry {
        de: "Besatzung",
        near: "Mannschaft",
        en: "crew",
    },
    LexEntry {
        de: "Notfall",
        near: "Ernstfall",
        en: "emergency",
    },
    LexEntry {
        de: "Sammelstelle",
        near: "Treffpunkt",
        en: "muster station",
    },
    LexEntry {
        de: "Rucksack",
        near: "Ranzen",
        en: "backpack",
    },
    LexEntry {
        de: "gefunden",
        near: "entdeckt",
        en: "found",
    },
    LexEntry {
        de: "abholen",
        near: "holen",
        en: "collect",
    },
    LexEntry {
        de: "Fahrplan",
        near: "Zeitplan",
        en: "timetable",
    },
    LexEntry {
        de: "Lounge",
        near: "Salon",
        en: "lounge",
    },
    LexEntry {
        de: "Durchsage",
        near: "Ansage",
        en: "announcement",
    },
    LexEntry {
        de: "Spur",
        near: "Fahrbahn",
        en: "lane",
    },
    LexEntry {
        de: "Sitz",
        near: "Stuhl",
        en: "seat",
    },
    LexEntry {
        de: "Leine",
        near: "Kette",
        en: "lead",
    },
    LexEntry {
        de: "Ticket",
        near: "Billett",
        en: "ticket",
    },
    LexEntry {
        de: "Fahrkarte",
        near: "Karte",
        en: "ticket",
    },
    LexEntry {
        de: "Uhr",
        near: "h",
        en: "o'clock",
    },
    LexEntry {
        de: "ausgebucht",
        near: "voll",
        en: "fully booked",
    },
    LexEntry {
        de: "Geduld",
        near: "Ausdauer",
        en: "patience",
    },
];
