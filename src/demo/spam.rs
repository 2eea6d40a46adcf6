//! Junk mail of the scenario and the disguises junk senders use against word-based filters:
//! look-alike Cyrillic letters inside Latin words, zero-width characters inside words,
//! s p a c e d letters, hidden padding text in HTML, and messages that are only an image and
//! a link. Every product, company and offer here is invented for this project.

use super::content::{Attachment, Block, Draft, Lang, Layout};
use super::rng::Rng;
use super::scenario::{self, BILLING_ORGS, Domain, Kind};

fn weights(kind: Kind) -> [u32; 8] {
    // prize, fake invoice, pharmacy, crypto, account phish, image only, russian, german
    match kind {
        Kind::University => [14, 12, 16, 20, 16, 10, 6, 6],
        Kind::Hosting => [12, 16, 14, 20, 10, 10, 14, 4],
        Kind::Firm => [12, 22, 12, 16, 10, 10, 4, 14],
        Kind::Clinic => [12, 12, 30, 14, 12, 10, 4, 6],
    }
}

/// One junk message for `to` at `dom`.
pub(crate) fn draft(rng: &mut Rng, dom: &Domain, to_name: &str, to_addr: &str) -> Draft {
    let mut d = match rng.weighted(&weights(dom.kind)) {
        0 => prize(rng, to_addr),
        1 => fake_invoice(rng, to_name),
        2 => pharmacy(rng),
        3 => crypto(rng),
        4 => account_phish(rng, dom, to_addr),
        5 => image_only(rng),
        6 => russian(rng),
        _ => german(rng),
    };
    disguise(rng, &mut d);
    d
}

fn junk_sender(rng: &mut Rng, names: &[&str], locals: &[&str]) -> (String, String, String, String) {
    let domain = scenario::junk_domain(rng);
    let name = rng.pick_str(names).to_string();
    let local = rng.pick_str(locals).to_string();
    let ip = scenario::junk_ip(rng);
    // Junk often comes from hosts whose HELO does not match their reverse name.
    let helo = if rng.chance(500) {
        format!("mail.{domain}")
    } else {
        format!(
            "{}.{}",
            rng.alnum(6).to_lowercase(),
            scenario::junk_domain(rng)
        )
    };
    (name, format!("{local}@{domain}"), helo, ip)
}

fn with_relay(mut d: Draft, helo: String, ip: String, rng: &mut Rng) -> Draft {
    let rdns = if rng.chance(400) {
        String::new()
    } else {
        format!("host-{}.dyn.example.net", ip.replace('.', "-"))
    };
    d.relay = (helo, rdns, ip);
    d
}

fn link(rng: &mut Rng, path: &str) -> String {
    let scheme = if rng.chance(600) { "https" } else { "http" };
    format!("{scheme}://{}/{path}?id={}", scenario::junk_domain(rng), {
        let n = rng.range(8, 20);
        rng.alnum(n)
    })
}

fn prize(rng: &mut Rng, to_addr: &str) -> Draft {
    let (name, addr, helo, ip) = junk_sender(
        rng,
        &[
            "Prize Notification Office",
            "International Fortune Draw",
            "Claims Department",
        ],
        &["claims", "winner.notice", "award", "info"],
    );
    let amount = format!(
        "{},{:03},000.00",
        rng.range(1, 9),
        rng.range(100, 999) / 10 * 10
    );
    let subject = rng
        .pick_str(&[
            "Congratulations! Your email has won {a} EUR",
            "FINAL NOTICE: unclaimed prize of {a} EUR",
            "You have been selected as a winner",
            "Winning notification ref {r}",
        ])
        .replace("{a}", &amount)
        .replace("{r}", &rng.alnum(8).to_uppercase());
    let mut d = Draft::new(Lang::En, &name, &addr, subject);
    let batch = rng.range(1000, 9999);
    d.reply_to = Some(format!(
        "agent{}@{}",
        rng.range(1, 99),
        scenario::junk_domain(rng)
    ));
    d.blocks = vec![
        Block::Para("Dear Lucky Winner,".to_string()),
        Block::Para(format!(
            "We are pleased to inform you that your email address {to_addr} was drawn as one \
             of the five winners of our annual international online draw, batch number \
             {batch}. You have won the sum of {amount} EUR."
        )),
        Block::Para(
            "The draw was conducted by computer ballot from over 40,000 email addresses \
             worldwide. To claim your prize, contact our claims agent with your full name, \
             address, telephone number and a copy of your identity document. A small \
             processing fee applies and will be deducted from your winnings."
                .to_string(),
        ),
        Block::Para(
            "Keep this notice confidential until your claim has been processed, to avoid \
             double claiming. Failure to respond within 7 days will result in your prize \
             being returned to the fund."
                .to_string(),
        ),
        Block::Button {
            text: "CLAIM YOUR PRIZE NOW".to_string(),
            url: link(rng, "claim"),
        },
        Block::Verbatim("Yours faithfully,\nMrs. Clara Benedetti-Moss\nPrize Coordinator".into()),
    ];
    d.layout = pick_layout(rng);
    with_relay(d, helo, ip, rng)
}

fn fake_invoice(rng: &mut Rng, to_name: &str) -> Draft {
    // Impersonates a real sender of the scenario from a look-alike domain.
    let target = rng.pick(BILLING_ORGS);
    let (org_name, spoof) = match target {
        Some(o) => {
            // Only the first label is altered so the domain stays under its reserved suffix.
            let (first, rest) = o.domain.split_once('.').unwrap_or((o.domain, "example"));
            let first = first.replacen('l', "1", 1).replacen('o', "0", 1);
            (o.name, format!("{first}.{rest}"))
        }
        None => ("Accounts", "billing-center.example".to_string()),
    };
    let spoof = if rng.chance(500) {
        spoof
    } else {
        scenario::junk_domain(rng)
    };
    let number = format!("{:08}", rng.below(99_999_999));
    let subject = rng
        .pick_str(&[
            "Overdue invoice {n} - immediate payment required",
            "Invoice {n} attached",
            "RE: Payment for invoice {n}",
            "Your account is past due",
        ])
        .replace("{n}", &number);
    let from = format!(
        "{}@{spoof}",
        rng.pick_str(&["accounts", "billing", "invoice"])
    );
    let mut d = Draft::new(Lang::En, org_name, &from, subject);
    let greet = if to_name.is_empty() || rng.chance(500) {
        "Hello,".to_string()
    } else {
        format!("Dear {to_name},")
    };
    d.blocks = vec![
        Block::Para(greet),
        Block::Para(format!(
            "Please see the attached invoice {number}. Our records show that this payment \
             is now {} days overdue. To avoid a late fee and suspension of your service, \
             settle the outstanding balance today.",
            rng.range(7, 45)
        )),
        Block::Para(
            "Open the attached document for the payment details. If you have already paid, \
             please send us the remittance advice by replying to this message."
                .to_string(),
        ),
        Block::Verbatim("Kind regards,\nAccounts Receivable".to_string()),
    ];
    match rng.below(3) {
        0 => d.attachments.push(Attachment::Zip {
            filename: format!("Invoice_{number}.zip"),
            inner: format!("Invoice_{number}.pdf.js"),
        }),
        1 => d.attachments.push(Attachment::Pdf {
            filename: format!("INV{number}.pdf"),
            lines: vec![
                "Invoice".to_string(),
                "Click to view the document online".to_string(),
            ],
        }),
        _ => d.blocks.insert(
            2,
            Block::Button {
                text: "View invoice".to_string(),
                url: link(rng, "docs/invoice"),
            },
        ),
    }
    d.layout = if rng.chance(500) {
        Layout::Plain
    } else {
        Layout::Alternative
    };
    let (_, _, helo, ip) = junk_sender(rng, &[""], &[""]);
    with_relay(d, helo, ip, rng)
}

const PHARMA: &[(&str, &str)] = &[
    ("Vitaloxin", "more energy and stamina all day long"),
    ("Somnarel", "deep restful sleep without a prescription"),
    (
        "Flexadrin",
        "joint comfort and flexibility in just two weeks",
    ),
    ("Noctivane", "natural calm and better focus"),
    ("Slimora Forte", "effortless weight loss while you sleep"),
];

fn pharmacy(rng: &mut Rng) -> Draft {
    let (name, addr, helo, ip) = junk_sender(
        rng,
        &[
            "Online Health Store",
            "Discount Meds",
            "Wellness Outlet",
            "",
        ],
        &["orders", "deals", "support", "noreply"],
    );
    let (product, claim) = rng
        .pick(PHARMA)
        .copied()
        .unwrap_or(("Vitaloxin", "more energy"));
    let pct = rng.range(40, 85);
    let subject = rng
        .pick_str(&[
            "{p}: {c}",
            "Save {x}% on {p} today only",
            "No prescription needed - {p} shipped discreetly",
            "Your order of {p} is ready",
        ])
        .replace("{p}", product)
        .replace("{c}", claim)
        .replace("{x}", &pct.to_string());
    let mut d = Draft::new(Lang::En, &name, &addr, subject);
    d.accent = "#c0392b";
    d.blocks = vec![
        Block::Heading(format!("{product} - {claim}")),
        Block::Para(format!(
            "Doctors don't want you to know about {product}. Thousands of satisfied customers \
             already enjoy {claim}. No prescription, no waiting room, no embarrassing \
             questions."
        )),
        Block::Bullets(vec![
            format!("Up to {pct}% off regular pharmacy prices"),
            "Discreet packaging, worldwide shipping".to_string(),
            "100% money-back guarantee".to_string(),
            "Secure online ordering".to_string(),
        ]),
        Block::Button {
            text: "ORDER NOW".to_string(),
            url: link(rng, "shop"),
        },
        Block::Small(
            "You received this mail because you opted in to health offers. To stop \
             receiving these messages, click here."
                .to_string(),
        ),
    ];
    d.layout = pick_layout(rng);
    with_relay(d, helo, ip, rng)
}

const COINS: &[&str] = &[
    "QuorraCoin",
    "Lumenvault",
    "ZephyrYield",
    "Brightmint Token",
];

fn crypto(rng: &mut Rng) -> Draft {
    let (name, addr, helo, ip) = junk_sender(
        rng,
        &[
            "Crypto Insider",
            "Market Signals Daily",
            "Investor Relations",
            "Elena from the team",
        ],
        &["alerts", "signals", "hello", "team"],
    );
    let coin = rng.pick_str(COINS);
    let x = rng.range(5, 40);
    let subject = rng
        .pick_str(&[
            "{c} is about to explode - get in before Friday",
            "Turn 250 EUR into {x}000 EUR with {c}",
            "Last chance: early access to {c}",
            "Your wallet is eligible for a {c} bonus",
        ])
        .replace("{c}", coin)
        .replace("{x}", &x.to_string());
    let mut d = Draft::new(Lang::En, &name, &addr, subject);
    d.accent = "#6c3483";
    d.blocks = vec![
        Block::Heading(format!("Why everyone is talking about {coin}")),
        Block::Para(format!(
            "Early investors in {coin} have already seen returns of more than {x}00%. Our \
             automated trading platform does all the work for you - no experience needed, \
             withdraw any time."
        )),
        Block::Para(
            "Register today with a minimum deposit of 250 EUR and our personal account \
             manager will call you within 24 hours to set up your portfolio. Places in the \
             early access programme are strictly limited."
                .to_string(),
        ),
        Block::Button {
            text: "Start earning now".to_string(),
            url: link(rng, "join"),
        },
        Block::Small(
            "Past performance is no guarantee of future results. This is not financial \
             advice."
                .to_string(),
        ),
    ];
    d.layout = pick_layout(rng);
    with_relay(d, helo, ip, rng)
}

fn account_phish(rng: &mut Rng, dom: &Domain, to_addr: &str) -> Draft {
    // Claims to come from the recipient's own IT department, from elsewhere.
    let (_, addr, helo, ip) = junk_sender(rng, &[""], &["it-support", "helpdesk", "admin"]);
    let subject = rng
        .pick_str(&[
            "Mailbox storage limit exceeded",
            "Action required: verify your {d} account",
            "Your password expires today",
            "{d} security alert: unusual activity",
        ])
        .replace("{d}", dom.name);
    let mut d = Draft::new(
        Lang::En,
        &format!("{} IT Support", dom.name),
        &addr,
        subject,
    );
    d.blocks = vec![
        Block::Para(format!("Dear user {to_addr},")),
        Block::Para(
            "Your mailbox has exceeded the storage limit set by your administrator. You may \
             not be able to send or receive new messages until you re-validate your account."
                .to_string(),
        ),
        Block::Para(
            "To avoid deactivation, confirm your login details within 24 hours using the \
             secure link below."
                .to_string(),
        ),
        Block::Button {
            text: "Validate account".to_string(),
            url: link(rng, "webmail/validate"),
        },
        Block::Small(format!(
            "(c) {} IT Services. All rights reserved.",
            dom.name
        )),
    ];
    d.layout = pick_layout(rng);
    with_relay(d, helo, ip, rng)
}

fn image_only(rng: &mut Rng) -> Draft {
    let (name, addr, helo, ip) = junk_sender(
        rng,
        &["Special Offer", "Exclusive Deals", "", "Member Rewards"],
        &["offers", "news", "promo"],
    );
    let subject = rng
        .pick_str(&[
            "See attached",
            "Your exclusive offer inside",
            "Only for you today",
            "Re: your request",
            "Don't miss this",
        ])
        .to_string();
    let mut d = Draft::new(Lang::En, &name, &addr, subject);
    let href = link(rng, "r");
    let src = if rng.chance(500) {
        format!("cid:{}@{}", rng.alnum(12), d.sender_domain())
    } else {
        format!(
            "http://img.{}/{}.png",
            scenario::junk_domain(rng),
            rng.alnum(10)
        )
    };
    d.blocks = vec![Block::Image {
        alt: String::new(),
        src,
        href: Some(href),
    }];
    d.layout = Layout::ImageOnly;
    with_relay(d, helo, ip, rng)
}

fn russian(rng: &mut Rng) -> Draft {
    let (_, addr, helo, ip) = junk_sender(rng, &[""], &["info", "manager", "sale"]);
    let (subject, body) = match rng.below(2) {
        0 => (
            "Базы клиентов для вашего бизнеса",
            [
                "Предлагаем актуальные базы данных потенциальных клиентов по всем регионам: \
                 организации, телефоны, электронные адреса, сферы деятельности.",
                "Только сегодня скидка 50% на любую базу. Бесплатное обновление в течение \
                 года. Звоните или пишите прямо сейчас!",
            ],
        ),
        _ => (
            "Увеличим продажи вашего сайта в 3 раза",
            [
                "Выведем ваш сайт в топ поисковых систем за 14 дней. Гарантия результата или \
                 возврат денег. Более тысячи довольных клиентов.",
                "Оставьте заявку сегодня и получите бесплатный аудит сайта и подарок - \
                 рекламную кампанию на месяц.",
            ],
        ),
    };
    let mut d = Draft::new(Lang::Ru, "Отдел продаж", &addr, subject.to_string());
    d.blocks = body.iter().map(|p| Block::Para((*p).to_string())).collect();
    d.blocks.push(Block::Button {
        text: "Подробнее".to_string(),
        url: link(rng, "ru"),
    });
    d.layout = pick_layout(rng);
    with_relay(d, helo, ip, rng)
}

fn german(rng: &mut Rng) -> Draft {
    let (_, addr, helo, ip) = junk_sender(rng, &[""], &["service", "kredit", "info"]);
    let (subject, body) = match rng.below(2) {
        0 => (
            "Sofortkredit bis 50.000 € – ohne Prüfung, heute ausgezahlt",
            [
                "Sie brauchen schnell Geld? Mit unserem Sofortkredit erhalten Sie bis zu \
                 50.000 € noch heute auf Ihr Konto – ganz ohne Bonitätsprüfung und ohne \
                 lästigen Papierkram.",
                "Jetzt in nur zwei Minuten online beantragen. Garantierte Zusage für alle \
                 Antragsteller!",
            ],
        ),
        _ => (
            "Herzlichen Glückwunsch! Sie haben gewonnen",
            [
                "Ihre E-Mail-Adresse wurde bei unserer großen Jahresverlosung als Gewinner \
                 gezogen. Ihr Gewinn: ein nagelneues Elektroauto oder 25.000 € in bar.",
                "Um Ihren Gewinn zu sichern, bestätigen Sie bitte innerhalb von 48 Stunden \
                 Ihre Daten über den folgenden Link. Eine kleine Bearbeitungsgebühr fällt an.",
            ],
        ),
    };
    let mut d = Draft::new(Lang::De, "Kundenservice", &addr, subject.to_string());
    d.blocks = body.iter().map(|p| Block::Para((*p).to_string())).collect();
    d.blocks.push(Block::Button {
        text: "Jetzt sichern".to_string(),
        url: link(rng, "de"),
    });
    d.layout = pick_layout(rng);
    with_relay(d, helo, ip, rng)
}

fn pick_layout(rng: &mut Rng) -> Layout {
    match rng.below(10) {
        0..=2 => Layout::Plain,
        3..=6 => Layout::HtmlOnly,
        _ => Layout::Alternative,
    }
}

/// Latin letters and the Cyrillic letters that look the same in most fonts.
const LOOKALIKES: &[(char, char)] = &[
    ('a', 'а'),
    ('e', 'е'),
    ('o', 'о'),
    ('p', 'р'),
    ('c', 'с'),
    ('x', 'х'),
    ('y', 'у'),
    ('i', 'і'),
    ('A', 'А'),
    ('E', 'Е'),
    ('O', 'О'),
    ('C', 'С'),
];

const ZERO_WIDTH: &[char] = &['\u{200b}', '\u{200c}', '\u{2060}', '\u{00ad}', '\u{feff}'];

/// Words junk senders most want to slip past a filter.
const TRIGGER_WORDS: &[&str] = &[
    "prize",
    "winner",
    "won",
    "claim",
    "invoice",
    "payment",
    "prescription",
    "order",
    "free",
    "discount",
    "earn",
    "bonus",
    "account",
    "password",
    "verify",
    "offer",
    "money",
    "CLAIM",
    "ORDER",
    "NOW",
    "PRIZE",
    "guarantee",
];

/// Applies a random selection of disguises to the draft's subject and text.
fn disguise(rng: &mut Rng, d: &mut Draft) {
    if d.lang != Lang::En {
        return;
    }
    let lookalike = rng.chance(220);
    let zero_width = rng.chance(180);
    let spaced = rng.chance(160);
    if !(lookalike || zero_width || spaced) {
        maybe_hide(rng, d);
        return;
    }
    d.needs_utf8 = lookalike || zero_width;
    let apply = |rng: &mut Rng, text: &str| -> String {
        let mut t = text.to_string();
        if spaced {
            t = space_letters(rng, &t);
        }
        if lookalike {
            t = swap_lookalikes(rng, &t);
        }
        if zero_width {
            t = insert_zero_width(rng, &t);
        }
        t
    };
    d.subject = apply(rng, &d.subject);
    for block in &mut d.blocks {
        match block {
            Block::Para(t) | Block::Heading(t) | Block::Small(t) => *t = apply(rng, t),
            Block::Button { text, .. } => *text = apply(rng, text),
            Block::Bullets(items) => {
                for item in items.iter_mut() {
                    *item = apply(rng, item);
                }
            }
            _ => {}
        }
    }
    maybe_hide(rng, d);
}

/// Adds hidden ham-like padding to HTML-bearing junk, to dilute the words that give it away.
fn maybe_hide(rng: &mut Rng, d: &mut Draft) {
    if matches!(d.layout, Layout::Plain | Layout::ImageOnly) || !rng.chance(300) {
        return;
    }
    let padding = [
        "The committee meeting is moved to Thursday afternoon in the seminar room.",
        "Please find the minutes of the last call and the draft schedule for next term.",
        "The library will extend its opening hours during the examination period.",
        "Thanks for the quick answer, the delivery time works for us.",
        "Attached are the reading list and the notes from the field trip.",
        "We agreed to freeze the file format for the next release.",
    ];
    let mut text = String::new();
    let n = rng.range(2, 5);
    for i in rng.sample_indices(padding.len(), n) {
        text.push_str(padding.get(i).copied().unwrap_or(""));
        text.push(' ');
    }
    let at = rng.below(d.blocks.len() + 1);
    d.blocks.insert(
        at.min(d.blocks.len()),
        Block::Hidden(text.trim_end().to_string()),
    );
}

fn is_trigger(word: &str) -> bool {
    let bare = word.trim_matches(|c: char| !c.is_alphanumeric());
    TRIGGER_WORDS.iter().any(|t| t.eq_ignore_ascii_case(bare)) || bare.len() >= 8
}

fn swap_lookalikes(rng: &mut Rng, text: &str) -> String {
    text.split(' ')
        .map(|word| {
            if !is_trigger(word) || !rng.chance(700) {
                return word.to_string();
            }
            word.chars()
                .map(|c| match LOOKALIKES.iter().find(|(l, _)| *l == c) {
                    Some((_, cyr)) if rng.chance(500) => *cyr,
                    _ => c,
                })
                .collect()
        })
        .collect::<Vec<_>>()
        .join(" ")
}

fn insert_zero_width(rng: &mut Rng, text: &str) -> String {
    text.split(' ')
        .map(|word| {
            if word.chars().count() < 4 || !rng.chance(400) {
                return word.to_string();
            }
            let zw = ZERO_WIDTH
                .get(rng.below(ZERO_WIDTH.len()))
                .copied()
                .unwrap_or('\u{200b}');
            let cut = rng.range(1, word.chars().count() - 1);
            let mut out = String::new();
            for (i, c) in word.chars().enumerate() {
                if i == cut {
                    out.push(zw);
                }
                out.push(c);
            }
            out
        })
        .collect::<Vec<_>>()
        .join(" ")
}

fn space_letters(rng: &mut Rng, text: &str) -> String {
    text.split(' ')
        .map(|word| {
            let bare = word.trim_matches(|c: char| !c.is_alphanumeric());
            let is_listed = TRIGGER_WORDS.iter().any(|t| t.eq_ignore_ascii_case(bare));
            if !is_listed || !rng.chance(800) {
                return word.to_string();
            }
            let upper = rng.chance(500);
            word.chars()
                .map(|c| if upper { c.to_ascii_uppercase() } else { c }.to_string())
                .collect::<Vec<_>>()
                .join(" ")
        })
        .collect::<Vec<_>>()
        .join(" ")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn spaced_letters_are_spaced() {
        let mut rng = Rng::new(9);
        let mut seen = false;
        for _ in 0..20 {
            seen |= space_letters(&mut rng, "claim your prize").contains("p r i z e")
                || space_letters(&mut rng, "claim your prize").contains("P R I Z E");
        }
        assert!(seen);
    }

    #[test]
    fn lookalikes_change_letters_but_not_length_in_chars() {
        let mut rng = Rng::new(11);
        let text = "verify your password immediately";
        let out = swap_lookalikes(&mut rng, text);
        assert_eq!(out.chars().count(), text.chars().count());
    }
}
