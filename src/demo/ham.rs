//! Legitimate mail of the scenario, including the hard cases a filter must not hold back:
//! newsletters full of links, invoices, account notices, list digests and mail in German,
//! French, Russian and Japanese. All text is written for this project.

use super::content::{Attachment, Block, DigestItem, Draft, Lang, Layout, ListInfo};
use super::rng::Rng;
use super::scenario::{
    BILLING_ORGS, CORRESPONDENTS, Domain, FRENCH_ORGS, GERMAN_ORGS, JAPANESE_ORGS, Kind,
    NEWSLETTER_ORGS, Org, RUSSIAN_ORGS,
};

/// The kinds of legitimate mail, in the order of the weight tables below.
const KINDS: usize = 10;

fn weights(kind: Kind) -> [u32; KINDS] {
    // personal, newsletter, invoice, account, digest, german, french, russian, japanese, notice
    match kind {
        Kind::University => [24, 12, 5, 9, 14, 8, 7, 6, 9, 6],
        Kind::Hosting => [12, 10, 18, 10, 8, 7, 5, 14, 3, 13],
        Kind::Firm => [20, 10, 20, 5, 3, 25, 12, 2, 1, 2],
        Kind::Clinic => [30, 14, 15, 12, 4, 8, 10, 2, 1, 4],
    }
}

/// One legitimate message for `to` at `dom`.
pub(crate) fn draft(rng: &mut Rng, dom: &Domain, to_name: &str) -> Draft {
    match rng.weighted(&weights(dom.kind)) {
        0 => personal(rng, dom, to_name),
        1 => newsletter(rng),
        2 => invoice(rng, dom, to_name),
        3 => account_notice(rng, dom),
        4 => digest(rng, dom),
        5 => german(rng, to_name),
        6 => french(rng, to_name),
        7 => russian(rng, to_name),
        8 => japanese(rng, to_name),
        _ => service_notice(rng, dom),
    }
}

fn first_name(full: &str) -> &str {
    full.trim_start_matches("Dr. ")
        .split_whitespace()
        .next()
        .unwrap_or("")
}

fn org<'a>(rng: &mut Rng, orgs: &'a [Org]) -> Option<&'a Org> {
    rng.pick(orgs)
}

fn weekday(rng: &mut Rng) -> &'static str {
    rng.pick_str(&["Monday", "Tuesday", "Wednesday", "Thursday", "Friday"])
}

fn amount(rng: &mut Rng, lo: usize, hi: usize) -> String {
    format!("{}.{:02}", rng.range(lo, hi), rng.below(100))
}

const TOPICS_UNI: &[(&str, &str, &str)] = &[
    (
        "Draft of chapter 3",
        "I have gone through the draft of chapter 3 you sent on {day}. The argument about \
         sediment transport in the lower estuary holds up, but the second half of the \
         results section repeats the figures from chapter 2 without saying what is new.",
        "Could you add a short paragraph that states the difference plainly, and move the \
         long table of station readings into an appendix? Then I think it is ready for the \
         committee.",
    ),
    (
        "Seminar room for the reading group",
        "The seminar room on the third floor is booked for the reading group every {day} \
         from 14:00 until 15:30 for the rest of term. The projector cable was missing last \
         week, so I have asked the building office to leave a spare one in the cupboard.",
        "If anyone wants to present in the first session, let me know by the end of the \
         week. We agreed to start with the two papers on tidal mixing that Pavel circulated.",
    ),
    (
        "Field trip logistics",
        "The minibus for the field trip is confirmed for {day} morning, leaving from the \
         car park behind the geology building at 07:45. We should be back by about 18:00 if \
         the ferry runs on time.",
        "Please bring boots, a waterproof jacket and your own lunch. I will bring the \
         sampling kits and the two handheld sensors, which still need charging.",
    ),
    (
        "Lab booking for next week",
        "I would like to book the wet lab for two half days next week, ideally {day} and \
         the day after, to run the grain size analysis on the new cores.",
        "The sieve shaker was making an odd noise last time; has anyone had a look at it? \
         If it is out of order I can use the laser instrument instead, but the queue there \
         is long.",
    ),
    (
        "Marking schedule",
        "Here is the plan for marking the second-year reports. Each of us takes about \
         twenty scripts, and we meet on {day} to compare a sample of five so the grades are \
         consistent.",
        "Feedback should reach the students within three weeks of the deadline, so we \
         have a little slack, but not much. Thanks for taking on the extra batch.",
    ),
];

const TOPICS_WORK: &[(&str, &str, &str)] = &[
    (
        "Quote for the replacement parts",
        "Thanks for the quick answer on {day}. The quote for the replacement blades and the \
         two gearbox seals looks fine to us. Could you confirm the delivery time before we \
         send the purchase order?",
        "We would also like to know whether the seals fit the older model of the bench \
         press, since we still have three of those in the workshop.",
    ),
    (
        "Migration of the mail server",
        "The migration of your mail server to the new platform is planned for {day} night \
         between 22:00 and 02:00. During that window incoming mail is queued, not lost, and \
         will be delivered as soon as the new server accepts it.",
        "Before then, please lower the TTL of your MX record to 300 seconds, as we \
         discussed on the phone. I will send a short note when everything is done.",
    ),
    (
        "Trade fair stand",
        "The organisers have confirmed our stand for the spring fair: hall 4, next to the \
         entrance from the east car park. We have the same floor space as last year.",
        "Could you check that the demonstration bench is back from repair by {day}? We need \
         to ship it a week before the fair opens.",
    ),
    (
        "Rota for the coming weeks",
        "I have updated the rota for the next four weeks. The main change is that the \
         Saturday morning clinic moves to the second floor while the waiting room is being \
         repainted.",
        "Please check your shifts and tell me by {day} if something does not work for you. \
         Swaps are fine as long as both of you let me know.",
    ),
    (
        "Your question about DNS",
        "You asked on {day} why the new subdomain did not resolve. The record was created \
         correctly, but the old negative answer was still cached by your resolver.",
        "It should work everywhere by now. If it does not, send me the output of a lookup \
         from the affected machine and I will look into it.",
    ),
];

fn personal(rng: &mut Rng, dom: &Domain, to_name: &str) -> Draft {
    let topics = if dom.kind == Kind::University {
        TOPICS_UNI
    } else {
        TOPICS_WORK
    };
    let (subject, p1, p2) = rng.pick(topics).copied().unwrap_or(("Hello", "", ""));
    let colleague = rng.chance(550);
    let (from_name, from_addr, host, ip) = if colleague {
        let (n, l) = rng
            .pick(dom.people)
            .copied()
            .unwrap_or(("Kim Example", "kim"));
        (
            n.to_string(),
            format!("{l}@{}", dom.name),
            format!("smtp-auth.{}", dom.name),
            format!("192.0.2.{}", rng.range(10, 40)),
        )
    } else {
        let (n, d) = rng
            .pick(CORRESPONDENTS)
            .copied()
            .unwrap_or(("Kim Example", "example.org"));
        let local = n.to_lowercase().replace([' ', '.'], "").replace('ö', "o");
        (
            n.to_string(),
            format!("{local}@{d}"),
            format!("smtp.{d}"),
            format!("198.51.100.{}", rng.range(2, 250)),
        )
    };
    let day = weekday(rng);
    let reply = rng.chance(400);
    let subject = if reply {
        format!("Re: {subject}")
    } else {
        subject.to_string()
    };
    let mut d = Draft::new(Lang::En, &from_name, &from_addr, subject).via(&host, &ip);
    let greet = if to_name.is_empty() {
        "Hello,".to_string()
    } else {
        format!(
            "{} {},",
            rng.pick_str(&["Hi", "Dear", "Hello"]),
            first_name(to_name)
        )
    };
    d.blocks.push(Block::Para(greet));
    d.blocks.push(Block::Para(p1.replace("{day}", day)));
    d.blocks.push(Block::Para(p2.replace("{day}", day)));
    if rng.chance(500) {
        d.blocks.push(Block::Para(
            rng.pick_str(&[
                "No rush on this, but an answer before the weekend would help with planning.",
                "I have copied the others in case they have something to add.",
                "Sorry for the long mail; the short version is that everything is on track.",
                "Let me know if a quick call would be easier than going back and forth here.",
            ])
            .to_string(),
        ));
    }
    let sign = first_name(&from_name).to_string();
    d.blocks.push(Block::Verbatim(format!(
        "{}\n{sign}",
        rng.pick_str(&[
            "Best wishes,",
            "Thanks,",
            "Regards,",
            "Cheers,",
            "All the best,"
        ])
    )));
    if reply {
        d.in_reply_to = Some(format!("<{}@{}>", rng.hex(16), dom.name));
        d.blocks.push(Block::Verbatim(format!(
            "On {day}, {} wrote:",
            if to_name.is_empty() { "you" } else { to_name }
        )));
        d.blocks.push(Block::Quote(format!(
            "{} {} Thanks in advance for any thoughts.",
            p1.replace("{day}", "last week"),
            rng.pick_str(&[
                "I have attached my notes from the last meeting as well.",
                "Happy to discuss at the next meeting if that is easier.",
                "I am away on Friday, so Thursday would be best for me.",
            ])
        )));
    }
    if rng.chance(200) {
        d.attachments.push(Attachment::Pdf {
            filename: rng
                .pick_str(&["notes.pdf", "draft-v3.pdf", "schedule.pdf", "minutes.pdf"])
                .to_string(),
            lines: vec![
                "Notes".to_string(),
                p1.replace("{day}", day).chars().take(90).collect(),
            ],
        });
    }
    d.layout = if rng.chance(350) {
        Layout::Alternative
    } else {
        Layout::Plain
    };
    d
}

const STORIES: &[(&str, &str)] = &[
    (
        "New titles this month",
        "Our shelves have filled up again: three new field guides to coastal birds, a \
         history of lighthouse keeping, and a cookbook built entirely around winter \
         vegetables. Members get early access until the end of the month.",
    ),
    (
        "Workshop: repairing your own tools",
        "Bring a blunt chisel, a wobbly hammer or a plane that has not cut cleanly in years. \
         Our volunteers will show you how to sharpen, re-handle and adjust them. Places are \
         limited to twelve per session.",
    ),
    (
        "Route of the season",
        "This season's featured route follows the old towpath for forty kilometres before \
         climbing gently through the orchards. There is a cafe at the halfway point and a \
         train station at each end for anyone who wants to shorten the ride.",
    ),
    (
        "Open data release",
        "The new release adds water level readings from eleven more stations and fixes the \
         time zone error that affected last year's winter series. The full changelog and \
         the download links are on the project page.",
    ),
    (
        "Concert programme announced",
        "The autumn programme opens with a cycle of string quartets and closes with a choral \
         evening on the longest night of the year. Subscribers can choose their seats from \
         next Monday before general sale begins.",
    ),
    (
        "Volunteer of the month",
        "This month we thank the volunteer who has catalogued more than four hundred maps \
         in the archive, many of them hand drawn and never recorded before. Read the short \
         interview on our website.",
    ),
    (
        "Members' survey results",
        "Thank you to everyone who answered the survey. Most of you asked for more evening \
         events and fewer long emails, so this newsletter is now shorter and the events \
         calendar lives on the website.",
    ),
    (
        "Changes to opening hours",
        "From next month we open an hour later on weekdays and stay open until 20:00 on \
         Thursdays. Weekend hours are unchanged.",
    ),
];

fn newsletter(rng: &mut Rng) -> Draft {
    let Some(o) = org(rng, NEWSLETTER_ORGS) else {
        return Draft::new(Lang::En, "", "news@example.org", "News".to_string());
    };
    let month = rng.pick_str(&["March", "April", "May", "Spring", "Early summer"]);
    let subject = rng.pick_str(&[
        "{org}: news for {month}",
        "Your {month} newsletter from {org}",
        "{org} | {month} edition",
        "What's on in {month}",
    ]);
    let subject = subject.replace("{org}", o.name).replace("{month}", month);
    let from = format!("news@{}", o.domain);
    let mut d = Draft::new(Lang::En, o.name, &from, subject).via(o.host, o.ip);
    d.bulk = true;
    d.accent = rng.pick_str(&["#2b6a4f", "#7a2e39", "#1f5f8b", "#8a5a00"]);
    let campaign = rng.alnum(10);
    let site = format!("https://www.{}", o.domain);
    d.list = Some(ListInfo {
        id: format!("{} newsletter <news.{}>", o.name, o.domain),
        unsubscribe: format!("{site}/unsubscribe?c={campaign}&u={}", rng.hex(12)),
    });
    d.blocks.push(Block::Image {
        alt: o.name.to_string(),
        src: format!("{site}/img/header-{}.png", rng.range(1, 9)),
        href: Some(site.clone()),
    });
    d.blocks.push(Block::Para(format!(
        "Hello and welcome to the {month} newsletter of {}.",
        o.name
    )));
    let n = rng.range(3, 6);
    for i in rng.sample_indices(STORIES.len(), n) {
        if let Some((title, text)) = STORIES.get(i) {
            d.blocks.push(Block::Heading((*title).to_string()));
            d.blocks.push(Block::Para((*text).to_string()));
            d.blocks.push(Block::Link {
                text: "Read more".to_string(),
                url: format!(
                    "{site}/news/{}?utm_campaign={campaign}",
                    title
                        .to_lowercase()
                        .replace(' ', "-")
                        .replace([':', '\''], "")
                ),
            });
        }
    }
    d.blocks.push(Block::Small(format!(
        "You receive this newsletter because you signed up at {site}. You can change your \
         preferences or unsubscribe at any time using the link below. {} is run by \
         volunteers; postal address: 4 Example Lane, Exampleton.",
        o.name
    )));
    d.blocks.push(Block::Link {
        text: "Unsubscribe or manage your preferences".to_string(),
        url: d
            .list
            .as_ref()
            .map(|l| l.unsubscribe.clone())
            .unwrap_or_default(),
    });
    d.layout = match rng.below(10) {
        0 => Layout::Plain,
        1 | 2 => Layout::HtmlOnly,
        _ => Layout::Alternative,
    };
    d
}

const ITEMS: &[&str] = &[
    "Printer paper A4, 80 g, 5 reams",
    "Toner cartridge, black",
    "Nitrile gloves, size M, box of 100",
    "Mobile plan, monthly fee",
    "Data add-on, 10 GB",
    "Virtual server S2, monthly",
    "Backup storage 200 GB",
    "Domain renewal, 1 year",
    "Return ticket, second class",
    "Seat reservation",
    "Pipette tips, 1000 ul, rack",
    "Sample bags, 500 pcs",
    "Desk lamp, LED",
];

fn invoice(rng: &mut Rng, dom: &Domain, to_name: &str) -> Draft {
    let Some(o) = org(rng, BILLING_ORGS) else {
        return Draft::new(Lang::En, "", "billing@example.org", "Invoice".to_string());
    };
    let number = format!(
        "{}-{:06}",
        rng.pick_str(&["INV", "RE", "R", "B"]),
        rng.below(999_999)
    );
    let receipt = rng.chance(400);
    let subject = if receipt {
        format!("Your receipt from {} ({number})", o.name)
    } else {
        rng.pick_str(&[
            "Invoice {n} from {org}",
            "Your invoice {n}",
            "{org}: invoice {n} is available",
        ])
        .replace("{n}", &number)
        .replace("{org}", o.name)
    };
    let from = format!(
        "{}@{}",
        rng.pick_str(&["billing", "invoices", "accounts", "no-reply"]),
        o.domain
    );
    let mut d = Draft::new(Lang::En, o.name, &from, subject).via(o.host, o.ip);
    d.accent = "#333333";
    let mut rows = vec![("Item".to_string(), "Amount (EUR)".to_string())];
    let mut total_cents = 0usize;
    let n = rng.range(1, 4);
    for i in rng.sample_indices(ITEMS.len(), n) {
        let cents = rng.range(300, 25_000);
        total_cents += cents;
        rows.push((
            ITEMS.get(i).copied().unwrap_or("Item").to_string(),
            format!("{}.{:02}", cents / 100, cents % 100),
        ));
    }
    let total = format!("{}.{:02}", total_cents / 100, total_cents % 100);
    rows.push(("Total incl. VAT".to_string(), total.clone()));
    let greet = if to_name.is_empty() {
        "Dear customer,".to_string()
    } else {
        format!("Dear {to_name},")
    };
    d.blocks.push(Block::Para(greet));
    if receipt {
        d.blocks.push(Block::Para(format!(
            "Thank you for your payment. This is your receipt for order {number}. No further \
             action is needed."
        )));
    } else {
        d.blocks.push(Block::Para(format!(
            "Please find attached invoice {number} for your account with {}. The amount is \
             due within {} days by bank transfer; please quote the invoice number as the \
             payment reference.",
            o.name,
            rng.pick_str(&["14", "21", "30"])
        )));
    }
    d.blocks.push(Block::Table(rows));
    d.blocks.push(Block::Link {
        text: "View your account and past invoices".to_string(),
        url: format!("https://account.{}/invoices/{}", o.domain, rng.hex(8)),
    });
    d.blocks.push(Block::Small(format!(
        "{} - customer number {} - questions about this invoice: reply to this message or \
         call the number on your contract. Sent to a mailbox at {}.",
        o.name,
        rng.range(10_000, 99_999),
        dom.name
    )));
    if !receipt || rng.chance(300) {
        d.attachments.push(Attachment::Pdf {
            filename: format!("{number}.pdf"),
            lines: vec![
                o.name.to_string(),
                format!("Invoice {number}"),
                format!("Total EUR {total}"),
            ],
        });
    }
    d.layout = if rng.chance(600) {
        Layout::Alternative
    } else {
        Layout::Plain
    };
    d
}

fn account_notice(rng: &mut Rng, dom: &Domain) -> Draft {
    let (service, host) = match dom.kind {
        Kind::University => (
            "Lindqvist University account service",
            format!("idm.{}", dom.name),
        ),
        Kind::Hosting => ("Harbourhost control panel", format!("panel.{}", dom.name)),
        Kind::Firm => ("Ostara-Tools Webmail", format!("webmail.{}", dom.name)),
        Kind::Clinic => (
            "Kittiwake appointment system",
            format!("termine.{}", dom.name),
        ),
    };
    let from = format!("no-reply@{host}");
    let token = rng.alnum(32);
    let url = format!("https://{host}/reset?token={token}");
    let code = format!("{:06}", rng.below(1_000_000));
    let (subject, blocks) = match rng.below(3) {
        0 => (
            "Password reset requested".to_string(),
            vec![
                Block::Para(format!(
                    "Someone, hopefully you, asked to reset the password of your account at \
                     {service}. To choose a new password, open the link below within 30 \
                     minutes."
                )),
                Block::Button {
                    text: "Choose a new password".to_string(),
                    url,
                },
                Block::Para(
                    "If you did not ask for this, you can ignore this message: your \
                     password stays as it is. We will never ask for your password by mail."
                        .to_string(),
                ),
            ],
        ),
        1 => (
            format!("Your sign-in code: {code}"),
            vec![
                Block::Para(format!("Your one-time sign-in code for {service} is:")),
                Block::Verbatim(format!("    {code}")),
                Block::Para(
                    "The code is valid for ten minutes. Do not share it with anyone, \
                     including staff of the help desk."
                        .to_string(),
                ),
            ],
        ),
        _ => (
            "New sign-in to your account".to_string(),
            vec![
                Block::Para(format!(
                    "We noticed a new sign-in to your account at {service} from a device we \
                     had not seen before."
                )),
                Block::Table(vec![
                    (
                        "Time".to_string(),
                        format!("{}:{:02} UTC", rng.range(6, 22), rng.below(60)),
                    ),
                    ("Approximate location".to_string(), "Exampleton".to_string()),
                    ("Browser".to_string(), "a desktop web browser".to_string()),
                ]),
                Block::Para(
                    "If this was you, there is nothing to do. If not, change your password \
                     on the account page and tell the help desk."
                        .to_string(),
                ),
                Block::Link {
                    text: "Review recent activity".to_string(),
                    url: format!("https://{host}/activity"),
                },
            ],
        ),
    };
    let mut d = Draft::new(Lang::En, service, &from, subject).via(
        &format!("notify.{}", dom.name),
        &format!("192.0.2.{}", rng.range(41, 60)),
    );
    d.blocks = blocks;
    d.blocks.push(Block::Small(format!(
        "This is an automated message from {service}. Replies to this address are not read."
    )));
    d.layout = if rng.chance(500) {
        Layout::Alternative
    } else {
        Layout::Plain
    };
    d
}

const LIST_POSTS: &[(&str, &str)] = &[
    (
        "Boundary conditions for the tidal model",
        "Has anyone tried forcing the open boundary with the harmonic constituents from the \
         regional model instead of the measured levels? I get a drift of a few centimetres \
         over a month and I am not sure whether it is real or an artefact of the forcing.",
    ),
    (
        "Re: Boundary conditions for the tidal model",
        "We saw the same drift. In our case it went away once we included the long-period \
         constituents, which the regional model output had dropped. Check the list of \
         constituents in the header of the forcing file.",
    ),
    (
        "Workshop announcement: data formats",
        "The one-day workshop on data formats will take place after the annual meeting. \
         Topics include metadata conventions, chunking for large arrays and how to document \
         a dataset so that others can reuse it. Registration is free but required.",
    ),
    (
        "Question about the build on older systems",
        "The latest release fails to build on our older cluster because the compiler there \
         is too old. Is there a known workaround, or should we ask the admins to install a \
         newer toolchain?",
    ),
    (
        "Re: Question about the build on older systems",
        "The simplest route is a user-level toolchain in your home directory; it takes ten \
         minutes. We stopped supporting that compiler version two releases ago, as noted \
         in the changelog.",
    ),
    (
        "Job opening: research software engineer",
        "Our group has an opening for a research software engineer for two years, with \
         the possibility of extension. The work is mostly on the data pipeline and the \
         test infrastructure. Details and how to apply are on the group website.",
    ),
    (
        "Minutes of the last call",
        "Attendance was good. We agreed to freeze the file format for the next release, to \
         move the weekly call to Thursdays, and to ask for volunteers to review the new \
         documentation pages before the end of the month.",
    ),
];

fn digest(rng: &mut Rng, dom: &Domain) -> Draft {
    let list = rng.pick_str(&["geo-modelling", "estuary-data", "build-help", "ostara-dev"]);
    let list_host = format!("lists.{}", dom.name);
    let number = rng.range(40, 420);
    let subject = format!("{list} digest, number {number}");
    let from = format!("{list}-bounces@{list_host}");
    let mut d = Draft::new(Lang::En, &format!("{list} list"), &from, subject)
        .via(&list_host, &format!("192.0.2.{}", rng.range(70, 90)));
    d.bulk = true;
    d.list = Some(ListInfo {
        id: format!("{list} discussion <{list}.{list_host}>"),
        unsubscribe: format!("https://{list_host}/options/{list}"),
    });
    let n = rng.range(3, 6);
    let picks = rng.sample_indices(LIST_POSTS.len(), n);
    let mut items = Vec::new();
    for i in picks {
        if let Some((subject, text)) = LIST_POSTS.get(i) {
            let (name, addr) = rng
                .pick(CORRESPONDENTS)
                .copied()
                .unwrap_or(("Kim Example", "example.org"));
            items.push(DigestItem {
                from: format!("{name} <{}@{addr}>", name.to_lowercase().replace(' ', ".")),
                subject: (*subject).to_string(),
                text: format!(
                    "{text}\n\n-- \n{name}\n",
                    text = super::content::wrap(text, 72, Lang::En, "")
                ),
            });
        }
    }
    let mut toc = Vec::new();
    for (i, item) in items.iter().enumerate() {
        toc.push(format!("{}. {} ({})", i + 1, item.subject, item.from));
    }
    d.blocks.push(Block::Para(format!(
        "This is the collected traffic of the {list} list. Post to the list at \
         {list}@{list_host}; change how you receive it at https://{list_host}/options/{list}. \
         If you answer one of the posts below, give your reply that post's subject rather \
         than the digest's, so the thread stays readable."
    )));
    d.blocks.push(Block::Heading("In this digest".to_string()));
    d.blocks.push(Block::Bullets(toc));
    if rng.chance(300) {
        d.layout = Layout::Digest;
        d.digest = items;
    } else {
        for (i, item) in items.iter().enumerate() {
            d.blocks.push(Block::Verbatim(format!(
                "----------------------------------------------------------------------\n\
                 Message: {}\nFrom: {}\nSubject: {}\n\n{}",
                i + 1,
                item.from,
                item.subject,
                item.text
            )));
        }
        d.blocks.push(Block::Verbatim(format!(
            "-- end of digest {number} of the {list} list --"
        )));
        d.layout = Layout::Plain;
    }
    d
}

fn service_notice(rng: &mut Rng, dom: &Domain) -> Draft {
    let host = format!("monitor.{}", dom.name);
    let server = format!("srv{:03}", rng.range(1, 240));
    let (subject, blocks) = match rng.below(4) {
        0 => (
            format!("Disk usage warning on {server}"),
            vec![
                Block::Para(format!(
                    "The data volume on {server} is {}% full. At the current rate of growth \
                     it will be full in about {} days.",
                    rng.range(81, 97),
                    rng.range(3, 20)
                )),
                Block::Bullets(vec![
                    "Remove old backups you no longer need.".to_string(),
                    "Rotate or compress log files.".to_string(),
                    "Or upgrade to a larger plan in the control panel.".to_string(),
                ]),
            ],
        ),
        1 => (
            "Scheduled maintenance this weekend".to_string(),
            vec![
                Block::Para(
                    "We will replace a network switch in rack 12 on Saturday between 02:00 \
                     and 04:00 UTC. Servers in that rack will be unreachable for up to \
                     fifteen minutes during the window."
                        .to_string(),
                ),
                Block::Para(
                    "No action is needed on your side. Status updates will be posted on our \
                     status page."
                        .to_string(),
                ),
            ],
        ),
        2 => (
            format!("Certificate for {} renewed", dom.name),
            vec![Block::Para(format!(
                "The TLS certificate for www.{} was renewed automatically and is valid for \
                 another 90 days. The old certificate will expire in {} days.",
                dom.name,
                rng.range(5, 29)
            ))],
        ),
        _ => (
            "Reminder: items due back at the library".to_string(),
            vec![
                Block::Para(
                    "The following items on your account are due back within three days. \
                     You can renew them online unless another reader has reserved them."
                        .to_string(),
                ),
                Block::Bullets(vec![
                    "Coastal processes and landforms, 2nd edition".to_string(),
                    "Statistics for environmental scientists".to_string(),
                ]),
            ],
        ),
    };
    let from = format!("notifications@{host}");
    let mut d = Draft::new(Lang::En, "Service notifications", &from, subject)
        .via(&host, &format!("192.0.2.{}", rng.range(90, 110)));
    d.blocks = blocks;
    d.blocks.push(Block::Verbatim(format!(
        "-- \nautomated notice, reference {}",
        rng.alnum(12)
    )));
    d.layout = Layout::Plain;
    if rng.chance(200) {
        d.attachments.push(Attachment::Text {
            filename: "details.txt".to_string(),
            text: format!(
                "host={server}\nchecked_at={}\nstatus=warning\n",
                rng.range(1_700_000_000, 1_800_000_000)
            ),
        });
    }
    d
}

fn foreign_sender(
    rng: &mut Rng,
    orgs: &[Org],
    people: &[&str],
) -> (String, String, String, String) {
    let person = rng.pick_str(people).to_string();
    match rng.pick(orgs) {
        Some(o) => (
            person,
            format!(
                "{}@{}",
                rng.pick_str(&["info", "kontakt", "office", "contact"]),
                o.domain
            ),
            o.host.to_string(),
            o.ip.to_string(),
        ),
        None => (
            person,
            "info@example.org".into(),
            "mail.example.org".into(),
            "192.0.2.1".into(),
        ),
    }
}

fn german(rng: &mut Rng, to_name: &str) -> Draft {
    let (name, addr, host, ip) = foreign_sender(
        rng,
        GERMAN_ORGS,
        &["Jörg Weißenbach", "Sabine Hüttler", "Uwe Brückmann"],
    );
    let (subject, paras): (&str, [&str; 3]) = match rng.below(3) {
        0 => (
            "Ihre Bestellung Nr. {n} – Lieferbestätigung",
            [
                "vielen Dank für Ihre Bestellung. Die Ware wird voraussichtlich am {day} \
                 ausgeliefert. Die Lieferung erfolgt frei Haus; bitte prüfen Sie die \
                 Vollständigkeit bei Anlieferung.",
                "Teillieferungen sind möglich, falls einzelne Positionen nicht vorrätig sind. \
                 Die Rechnung erhalten Sie wie gewohnt getrennt per E-Mail.",
                "Für Rückfragen stehen wir Ihnen gerne zur Verfügung.",
            ],
        ),
        1 => (
            "Angebot für Schleifscheiben und Zubehör",
            [
                "wie besprochen übersende ich Ihnen unser Angebot über 40 Schleifscheiben \
                 der Körnung 60 sowie zwei Ersatzflansche. Der Gesamtpreis beträgt {eur} € \
                 zuzüglich Mehrwertsteuer.",
                "Das Angebot ist gültig bis zum Monatsende. Bei Abnahme größerer Mengen \
                 können wir über einen Rabatt sprechen.",
                "Über eine positive Rückmeldung würde ich mich sehr freuen.",
            ],
        ),
        _ => (
            "Ablesung der Zählerstände am {day}",
            [
                "am {day} lesen unsere Mitarbeiterinnen und Mitarbeiter die Strom- und \
                 Wasserzähler in Ihrem Gebäude ab. Bitte sorgen Sie dafür, dass die Zähler \
                 zwischen 8 und 12 Uhr zugänglich sind.",
                "Falls Sie an diesem Tag verhindert sind, können Sie die Zählerstände auch \
                 selbst über unser Kundenportal melden. Die Frist endet eine Woche nach dem \
                 Ablesetermin.",
                "Wir danken für Ihr Verständnis.",
            ],
        ),
    };
    let day = rng.pick_str(&["Dienstag", "Mittwoch", "Donnerstag", "Freitag"]);
    let eur = amount(rng, 120, 2400).replace('.', ",");
    let n = rng.range(10_000, 99_999).to_string();
    let fill = |s: &str| {
        s.replace("{day}", day)
            .replace("{eur}", &eur)
            .replace("{n}", &n)
    };
    let mut d = Draft::new(Lang::De, &name, &addr, fill(subject)).via(&host, &ip);
    let greet = if to_name.is_empty() {
        "Sehr geehrte Damen und Herren,".to_string()
    } else {
        format!("Guten Tag {},", to_name.trim_start_matches("Dr. "))
    };
    d.blocks.push(Block::Para(greet));
    for p in paras {
        d.blocks.push(Block::Para(fill(p)));
    }
    d.blocks.push(Block::Verbatim(format!(
        "Mit freundlichen Grüßen\n{name}\n\n-- \n{}\nGeschäftsführung: Ilse Übelacker\n\
         Amtsgericht Exampleton, HRB {}",
        d.sender_domain(),
        rng.range(1000, 9999)
    )));
    if rng.chance(250) {
        d.attachments.push(Attachment::Pdf {
            filename: format!("Angebot_{n}.pdf"),
            lines: vec![format!("Angebot {n}"), format!("Summe EUR {eur}")],
        });
    }
    d.layout = if rng.chance(300) {
        Layout::Alternative
    } else {
        Layout::Plain
    };
    d
}

fn french(rng: &mut Rng, to_name: &str) -> Draft {
    let (name, addr, host, ip) = foreign_sender(
        rng,
        FRENCH_ORGS,
        &["Hélène Marsaudon", "Étienne Vauquelin", "Cécile Brochard"],
    );
    let (subject, paras): (&str, [&str; 3]) = match rng.below(3) {
        0 => (
            "Réunion du comité de pilotage – ordre du jour",
            [
                "Je vous prie de trouver ci-dessous l'ordre du jour de la prochaine réunion \
                 du comité de pilotage, prévue {day} à 10 h dans la salle du deuxième étage.",
                "Nous ferons d'abord le point sur l'avancement des travaux, puis nous \
                 discuterons du calendrier des mesures de terrain et du budget de l'année \
                 prochaine. Merci de me signaler les points que vous souhaitez ajouter.",
                "Un café sera servi à partir de 9 h 45.",
            ],
        ),
        1 => (
            "Devis n° {n} pour la fabrication des gabarits",
            [
                "Suite à notre échange téléphonique, vous trouverez en pièce jointe notre \
                 devis pour la fabrication de six gabarits de perçage en acier traité.",
                "Le délai de fabrication est de trois semaines à compter de la réception de \
                 votre commande. Le prix total s'élève à {eur} euros hors taxes, livraison \
                 comprise.",
                "Je reste à votre disposition pour toute précision.",
            ],
        ),
        _ => (
            "Invitation : journée d'étude sur les zones humides",
            [
                "Nous avons le plaisir de vous inviter à la journée d'étude consacrée aux \
                 zones humides littorales, qui aura lieu {day} dans l'amphithéâtre du \
                 laboratoire.",
                "Au programme : présentations des doctorants, table ronde sur le suivi à \
                 long terme des sites, et visite de la station de mesure l'après-midi. \
                 L'inscription est gratuite mais obligatoire.",
                "Au plaisir de vous y accueillir.",
            ],
        ),
    };
    let day = rng.pick_str(&["mardi prochain", "jeudi 14", "le vendredi 22", "lundi 3"]);
    let eur = amount(rng, 300, 6000).replace('.', ",");
    let n = rng.range(1000, 9999).to_string();
    let fill = |s: &str| {
        s.replace("{day}", day)
            .replace("{eur}", &eur)
            .replace("{n}", &n)
    };
    let mut d = Draft::new(Lang::Fr, &name, &addr, fill(subject)).via(&host, &ip);
    let greet = if to_name.is_empty() {
        "Madame, Monsieur,".to_string()
    } else {
        format!("Bonjour {},", first_name(to_name))
    };
    d.blocks.push(Block::Para(greet));
    for p in paras {
        d.blocks.push(Block::Para(fill(p)));
    }
    d.blocks.push(Block::Verbatim(format!(
        "Bien cordialement,\n{name}\n{}",
        d.sender_domain()
    )));
    if subject.starts_with("Devis") {
        d.attachments.push(Attachment::Pdf {
            filename: format!("devis-{n}.pdf"),
            lines: vec![format!("Devis {n}"), format!("Total HT {eur} EUR")],
        });
    }
    d.layout = if rng.chance(300) {
        Layout::Alternative
    } else {
        Layout::Plain
    };
    d
}

fn russian(rng: &mut Rng, to_name: &str) -> Draft {
    let (name, addr, host, ip) = foreign_sender(
        rng,
        RUSSIAN_ORGS,
        &["Ольга Ветлугина", "Игорь Самохвалов", "Нина Дорохова"],
    );
    let (subject, paras): (&str, [&str; 3]) = match rng.below(3) {
        0 => (
            "Счёт за услуги хостинга за {month}",
            [
                "Добрый день! Направляем вам счёт за услуги хостинга за {month}. Сумма к \
                 оплате составляет {rub} рублей. Оплатить можно банковским переводом по \
                 реквизитам, указанным в приложенном файле.",
                "Просим указать номер договора в назначении платежа, чтобы мы могли быстро \
                 зачислить оплату. Если счёт уже оплачен, просто не обращайте внимания на \
                 это письмо.",
                "По всем вопросам пишите в ответ на это сообщение.",
            ],
        ),
        1 => (
            "Совместная статья: замечания рецензентов",
            [
                "Коллеги, пришли замечания рецензентов по нашей совместной статье о \
                 паводках на малых реках. В целом отзывы положительные, но второй рецензент \
                 просит пояснить выбор станций и добавить сравнение с данными прошлых лет.",
                "Предлагаю разделить работу: я беру ответы по методике, а раздел с \
                 результатами лучше доработать вам, так как расчёты делались у вас. Срок \
                 подачи исправленной версии - через три недели.",
                "Давайте созвонимся в {day}, если вам удобно.",
            ],
        ),
        _ => (
            "Заказ на печать буклетов",
            [
                "Здравствуйте! Макет буклетов получили, спасибо. Тираж 500 экземпляров, \
                 формат А4 с двумя сгибами, бумага мелованная. Стоимость заказа - {rub} \
                 рублей, срок изготовления пять рабочих дней.",
                "Перед запуском в печать пришлём вам цифровую пробу на согласование. \
                 Обратите внимание, что на третьей странице текст подходит очень близко к \
                 линии сгиба.",
                "Ждём вашего подтверждения.",
            ],
        ),
    };
    let month = rng.pick_str(&["март", "апрель", "май"]);
    let day = rng.pick_str(&["понедельник", "среду", "четверг"]);
    let rub = rng.range(900, 48_000).to_string();
    let fill = |s: &str| {
        s.replace("{month}", month)
            .replace("{day}", day)
            .replace("{rub}", &rub)
    };
    let mut d = Draft::new(Lang::Ru, &name, &addr, fill(subject)).via(&host, &ip);
    if !to_name.is_empty() && rng.chance(300) {
        d.blocks
            .push(Block::Para(format!("Уважаемый(ая) {to_name},")));
    }
    for p in paras {
        d.blocks.push(Block::Para(fill(p)));
    }
    d.blocks.push(Block::Verbatim(format!(
        "С уважением,\n{name}\n{}",
        d.sender_domain()
    )));
    if subject.starts_with("Счёт") && rng.chance(600) {
        d.attachments.push(Attachment::Pdf {
            filename: format!("schet-{}.pdf", rng.range(100, 999)),
            lines: vec![format!("Schet, summa {rub} RUB")],
        });
    }
    d.layout = if rng.chance(250) {
        Layout::Alternative
    } else {
        Layout::Plain
    };
    d
}

fn japanese(rng: &mut Rng, to_name: &str) -> Draft {
    let (name, addr, host, ip) = foreign_sender(
        rng,
        JAPANESE_ORGS,
        &["山根 花子", "村瀬 健太", "小野寺 美咲"],
    );
    let (subject, paras): (&str, [&str; 3]) = match rng.below(3) {
        0 => (
            "会議の日程について（ご確認のお願い）",
            [
                "お世話になっております。来月の共同研究会議の日程について、候補日を三つ挙げ\
                 ましたので、ご都合をお知らせいただけますでしょうか。",
                "候補は{day}の午前、同じ週の木曜日の午後、翌週の月曜日の午前です。会場は当研\
                 究所の第二会議室を予定しておりますが、オンラインでの参加も可能です。",
                "お忙しいところ恐れ入りますが、今週中にご返信いただけますと幸いです。",
            ],
        ),
        1 => (
            "見積書送付のご案内",
            [
                "いつもお世話になっております。先日お問い合わせいただいた部品の見積書を添付\
                 にてお送りいたします。",
                "納期はご注文確定後、約三週間を予定しております。数量が変更になる場合は、お\
                 手数ですがご連絡ください。",
                "ご不明な点がございましたら、お気軽にお問い合わせください。",
            ],
        ),
        _ => (
            "交換留学プログラム説明会のお知らせ",
            [
                "交換留学プログラムの説明会を{day}に開催いたします。参加を希望される学生の\
                 方は、事前に申し込みをお願いいたします。",
                "説明会では、派遣先の大学の紹介、申請の手続き、奨学金について説明いたしま\
                 す。昨年度の参加者による体験談の発表も予定しております。",
                "多くの皆様のご参加をお待ちしております。",
            ],
        ),
    };
    let day = rng.pick_str(&["来週の火曜日", "十五日（水）", "二十日（月）"]);
    let mut d = Draft::new(Lang::Ja, &name, &addr, subject.to_string()).via(&host, &ip);
    let greet = if to_name.is_empty() {
        "ご担当者様".to_string()
    } else {
        format!("{to_name} 様")
    };
    d.blocks.push(Block::Para(greet));
    for p in paras {
        d.blocks.push(Block::Para(p.replace("{day}", day)));
    }
    d.blocks.push(Block::Verbatim(format!(
        "--\n{name}\n{}\n{}",
        JAPANESE_ORGS
            .iter()
            .find(|o| addr.ends_with(o.domain))
            .map(|o| o.name)
            .unwrap_or(""),
        addr
    )));
    if subject.starts_with("見積") {
        d.attachments.push(Attachment::Pdf {
            filename: format!("mitsumori-{}.pdf", rng.range(100, 999)),
            lines: vec!["Mitsumori".to_string()],
        });
    }
    d.layout = if rng.chance(200) {
        Layout::Alternative
    } else {
        Layout::Plain
    };
    d
}
