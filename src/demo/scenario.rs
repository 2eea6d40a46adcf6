//! The invented world the demo corpus takes place in.
//!
//! Every organisation, person, product and host name here is made up for this project, and
//! every domain is under a name reserved for documentation and testing (RFC 2606, RFC 6761:
//! `example.org`, `example.com`, `example.net`, `*.example`, `*.test`). Every IP address is in
//! a documentation range (RFC 5737, RFC 3849). Nothing here describes a real entity.

use super::rng::Rng;

/// What kind of organisation receives the mail; it sets the mix of ham and spam kinds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Kind {
    /// A university: lists, digests, many languages, account notices.
    University,
    /// A hosting provider: invoices, server notices, Russian and German customers, more spam.
    Hosting,
    /// A small tool-making firm: German and French business mail, suppliers' invoices.
    Firm,
    /// A small clinic: appointments, suppliers, and pharmacy-like junk that shares vocabulary.
    Clinic,
}

/// A recipient domain of the scenario.
#[derive(Debug)]
pub(crate) struct Domain {
    /// The domain name mail is addressed to.
    pub name: &'static str,
    /// Its inbound relay, which writes the last `Received` and `Authentication-Results`.
    pub mx: &'static str,
    /// Its mailbox store, the final internal hop.
    pub store: &'static str,
    /// Relative share of all generated mail.
    pub weight: u32,
    /// Share of ham, in per mille.
    pub ham_per_mille: u32,
    /// Which mixes of ham and spam kinds apply.
    pub kind: Kind,
    /// (display name, local part) of the people who receive mail here.
    pub people: &'static [(&'static str, &'static str)],
    /// Roles that receive mail (local parts) besides people.
    pub roles: &'static [&'static str],
    /// Zone offset of the recipient's relay, minutes east of UTC.
    pub tz: i32,
}

/// The recipient domains.
pub(crate) static DOMAINS: &[Domain] = &[
    Domain {
        name: "uni-lindqvist.test",
        mx: "mx2.uni-lindqvist.test",
        store: "postbox.it.uni-lindqvist.test",
        weight: 40,
        ham_per_mille: 790,
        kind: Kind::University,
        people: &[
            ("Astrid Kallvik", "astrid.kallvik"),
            ("Jonah Pettersund", "jonah.pettersund"),
            ("Mireille Oudart", "mireille.oudart"),
            ("Kenji Amamori", "k.amamori"),
            ("Dorota Welmsky", "d.welmsky"),
            ("Pavel Gurnov", "pavel.gurnov"),
            ("Ines Falkenrath", "ines.falkenrath"),
            ("Tobias Lindqvar", "tobias.lindqvar"),
            ("Hanna Østerbeck", "hanna.osterbeck"),
            ("Samuel Achterberg", "s.achterberg"),
        ],
        roles: &["registry", "library-desk", "geo-office"],
        tz: 60,
    },
    Domain {
        name: "harbourhost.example",
        mx: "in1.mx.harbourhost.example",
        store: "mbox3.harbourhost.example",
        weight: 30,
        ham_per_mille: 640,
        kind: Kind::Hosting,
        people: &[
            ("Rosalind Quarry", "rosalind"),
            ("Oskar Brannigan", "oskar"),
            ("Leontine Marsh", "leontine.marsh"),
            ("Vadim Serebrov", "vadim"),
            ("Priya Lanterman", "priya.l"),
        ],
        roles: &["support", "billing", "abuse", "noc"],
        tz: 0,
    },
    Domain {
        name: "ostara-tools.example",
        mx: "mail.ostara-tools.example",
        store: "mail.ostara-tools.example",
        weight: 20,
        ham_per_mille: 850,
        kind: Kind::Firm,
        people: &[
            ("Greta Ostermeier", "g.ostermeier"),
            ("Lukas Feldhammer", "l.feldhammer"),
            ("Anouk Berrichon", "a.berrichon"),
            ("Matthis Kroll", "m.kroll"),
        ],
        roles: &["einkauf", "vertrieb", "info"],
        tz: 60,
    },
    Domain {
        name: "kittiwake-clinic.example",
        mx: "relay.kittiwake-clinic.example",
        store: "store.kittiwake-clinic.example",
        weight: 10,
        ham_per_mille: 780,
        kind: Kind::Clinic,
        people: &[
            ("Dr. Maren Holloway", "m.holloway"),
            ("Felix Tranmere", "f.tranmere"),
            ("Yasmin Corriveau", "y.corriveau"),
        ],
        roles: &["reception", "pharmacy-orders", "admin"],
        tz: 0,
    },
];

/// A legitimate sending organisation.
#[derive(Debug)]
pub(crate) struct Org {
    /// The name people know it by.
    pub name: &'static str,
    /// Its sending domain.
    pub domain: &'static str,
    /// Its outbound relay host.
    pub host: &'static str,
    /// Its outbound relay address.
    pub ip: &'static str,
}

/// Organisations that send newsletters.
pub(crate) static NEWSLETTER_ORGS: &[Org] = &[
    Org {
        name: "Tern & Ledger Booksellers",
        domain: "ternledger.example",
        host: "out2.ternledger.example",
        ip: "198.51.100.23",
    },
    Org {
        name: "Brackenfield Makers Journal",
        domain: "brackenfield.example.org",
        host: "lists.brackenfield.example.org",
        ip: "198.51.100.41",
    },
    Org {
        name: "Cobalt Fern Cycling Club",
        domain: "cobaltfern.test",
        host: "smtp.cobaltfern.test",
        ip: "203.0.113.77",
    },
    Org {
        name: "Saltmarsh Open Data Network",
        domain: "saltmarsh-data.example.net",
        host: "news.saltmarsh-data.example.net",
        ip: "198.51.100.102",
    },
    Org {
        name: "Verdigris Concert Hall",
        domain: "verdigris-hall.example",
        host: "mta7.verdigris-hall.example",
        ip: "192.0.2.61",
    },
];

/// Organisations that send invoices and receipts.
pub(crate) static BILLING_ORGS: &[Org] = &[
    Org {
        name: "Pellworm Office Supply",
        domain: "pellworm-supply.example",
        host: "mailer.pellworm-supply.example",
        ip: "198.51.100.140",
    },
    Org {
        name: "Quillon Telecom",
        domain: "quillon-tel.example",
        host: "bill-out.quillon-tel.example",
        ip: "203.0.113.12",
    },
    Org {
        name: "Harbourhost Billing",
        domain: "harbourhost.example",
        host: "billing-out.harbourhost.example",
        ip: "192.0.2.30",
    },
    Org {
        name: "Fjellrand Rail Tickets",
        domain: "fjellrand-rail.example.com",
        host: "tickets-mx.fjellrand-rail.example.com",
        ip: "198.51.100.201",
    },
    Org {
        name: "Marrowby Lab Consumables",
        domain: "marrowby-lab.example",
        host: "mx-out.marrowby-lab.example",
        ip: "203.0.113.150",
    },
];

/// Partners who write in German, French, Russian and Japanese.
pub(crate) static GERMAN_ORGS: &[Org] = &[
    Org {
        name: "Werkzeughandel Brenning",
        domain: "brenning-werkzeug.example",
        host: "mail.brenning-werkzeug.example",
        ip: "198.51.100.77",
    },
    Org {
        name: "Stadtwerke Auenfeld",
        domain: "sw-auenfeld.test",
        host: "mx.sw-auenfeld.test",
        ip: "203.0.113.88",
    },
];

/// French-writing partners.
pub(crate) static FRENCH_ORGS: &[Org] = &[
    Org {
        name: "Atelier Sorbier",
        domain: "atelier-sorbier.example",
        host: "smtp.atelier-sorbier.example",
        ip: "198.51.100.9",
    },
    Org {
        name: "Laboratoire Combelune",
        domain: "combelune.example.net",
        host: "mx1.combelune.example.net",
        ip: "192.0.2.144",
    },
];

/// Russian-writing partners.
pub(crate) static RUSSIAN_ORGS: &[Org] = &[
    Org {
        name: "Типография Вереск",
        domain: "veresk-print.example",
        host: "mail.veresk-print.example",
        ip: "203.0.113.201",
    },
    Org {
        name: "Кафедра гидрологии Северореченска",
        domain: "hydro.severorechensk.test",
        host: "relay.severorechensk.test",
        ip: "198.51.100.177",
    },
];

/// Japanese-writing partners.
pub(crate) static JAPANESE_ORGS: &[Org] = &[
    Org {
        name: "星空研究所",
        domain: "hoshizora-inst.example",
        host: "mx01.hoshizora-inst.example",
        ip: "192.0.2.99",
    },
    Org {
        name: "浜風工業",
        domain: "hamakaze-kogyo.example.com",
        host: "smtp.hamakaze-kogyo.example.com",
        ip: "203.0.113.58",
    },
];

/// People outside the recipient domains who write personal mail, with their home domains.
pub(crate) static CORRESPONDENTS: &[(&str, &str)] = &[
    ("Eleanor Vasquez-Thorne", "thorne-consulting.example.com"),
    ("Bram Eijkelhof", "eijkelhof.example.net"),
    ("Moira Galbraith", "galbraith-family.example.org"),
    ("Chidi Okonkwo-Ranft", "ranft-partners.example"),
    ("Linnea Sjöbacka", "sjobacka.example.net"),
    ("Teodor Vrabie", "mail.example.com"),
    ("Harriet Pennywhistle", "example.org"),
];

/// A display name and mailbox picked from a domain's people (or one of its roles).
pub(crate) fn recipient(rng: &mut Rng, domain: &Domain) -> (String, String) {
    if rng.chance(150) {
        let role = rng.pick_str(domain.roles);
        return (String::new(), format!("{role}@{}", domain.name));
    }
    match rng.pick(domain.people) {
        Some((name, local)) => ((*name).to_string(), format!("{local}@{}", domain.name)),
        None => (String::new(), format!("postmaster@{}", domain.name)),
    }
}

/// Syllables for invented throw-away domains used by junk senders.
const SYLLABLES: &[&str] = &[
    "zor", "vex", "quin", "lumo", "bril", "tak", "oro", "mex", "fina", "dral", "uvo", "kess",
    "plor", "yan", "gri", "sto", "nemo", "cai", "rux", "bel",
];

const JUNK_SUFFIXES: &[&str] = &[
    "example",
    "example.com",
    "example.net",
    "example.org",
    "test",
    "mail.example",
    "info.test",
];

/// A throw-away sender domain of the kind junk is sent from.
pub(crate) fn junk_domain(rng: &mut Rng) -> String {
    let mut name = String::new();
    for _ in 0..rng.range(2, 3) {
        name.push_str(rng.pick_str(SYLLABLES));
    }
    if rng.chance(400) {
        name.push('-');
        name.push_str(&rng.range(2, 999).to_string());
    }
    format!("{name}.{}", rng.pick_str(JUNK_SUFFIXES))
}

/// An address in a documentation range that looks like a residential or rented host.
pub(crate) fn junk_ip(rng: &mut Rng) -> String {
    let net = rng.pick_str(&["192.0.2", "198.51.100", "203.0.113"]);
    format!("{net}.{}", rng.range(2, 254))
}
