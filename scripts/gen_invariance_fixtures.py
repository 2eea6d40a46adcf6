#!/usr/bin/env python3
"""Writes tests/fixtures/invariance/: one folder per group, one .eml per way of sending
the same text. Every message in a group must give tamis the same body tokens.

Encodings are produced by Python's standard library (base64, quopri, codecs), an
implementation independent of tamis. The text is invented demonstration text.
Run from the repository root: python3 scripts/gen_invariance_fixtures.py
"""
import base64
import html
import os
import quopri

OUT = os.path.join("tests", "fixtures", "invariance")

HEAD = (
    "From: Mira Okonkwo <mira@uni-lindqvist.test>\r\n"
    "To: staff@uni-lindqvist.test\r\n"
    "Subject: Canteen menu\r\n"
    "Date: Tue, 01 Dec 2026 09:00:00 +0000\r\n"
    "Message-ID: <{name}@uni-lindqvist.test>\r\n"
    "MIME-Version: 1.0\r\n"
)


def wrap76(data: bytes) -> bytes:
    return b"\r\n".join(data[i:i + 76] for i in range(0, len(data), 76))


def single(name, ctype, charset, cte, body: bytes) -> bytes:
    head = HEAD.format(name=name) + (
        f"Content-Type: {ctype}; charset={charset}\r\n"
        f"Content-Transfer-Encoding: {cte}\r\n\r\n"
    )
    return head.encode("ascii") + body


def as_html(text: str) -> str:
    paragraphs = text.split("\n\n")
    return "<html><head><style>p {margin:0}</style></head><body>" + "".join(
        f"<p>{html.escape(p).replace(chr(10), '<br>')}</p>" for p in paragraphs
    ) + "</body></html>"


def variants(text: str, legacy: list[str]):
    utf8 = text.encode("utf-8")
    yield "8bit", single("8bit", "text/plain", "utf-8", "8bit", utf8.replace(b"\n", b"\r\n"))
    yield "qp", single("qp", "text/plain", "utf-8", "quoted-printable",
                       quopri.encodestring(utf8.replace(b"\n", b"\r\n")))
    yield "base64", single("base64", "text/plain", "utf-8", "base64", wrap76(base64.b64encode(utf8)))
    page = as_html(text).encode("utf-8")
    yield "html-only", single("html", "text/html", "utf-8", "quoted-printable", quopri.encodestring(page))
    for charset in legacy:
        yield f"legacy-{charset}", single(charset, "text/plain", charset, "base64",
                                          wrap76(base64.b64encode(text.encode(charset))))
    head = HEAD.format(name="alt") + (
        'Content-Type: multipart/alternative; boundary="=_alt_7"\r\n\r\n'
    )
    alt = (head + "This is a multi-part message in MIME format.\r\n"
           "--=_alt_7\r\nContent-Type: text/plain; charset=utf-8\r\n"
           "Content-Transfer-Encoding: quoted-printable\r\n\r\n").encode("ascii")
    alt += quopri.encodestring(utf8.replace(b"\n", b"\r\n"))
    alt += (b"\r\n--=_alt_7\r\nContent-Type: text/html; charset=utf-8\r\n"
            b"Content-Transfer-Encoding: base64\r\n\r\n")
    alt += wrap76(base64.b64encode(page)) + b"\r\n--=_alt_7--\r\n"
    yield "alternative", alt


GROUPS = {
    "latin": (
        "Thursday menu at the Lindqvist canteen: crème brûlée, naïve apple tart\n"
        "and a café au lait for 2,50 €.\n\nOrders close at 11:30; ask Søren at the counter.",
        ["iso-8859-15", "windows-1252"],
    ),
    "cyrillic": (
        "Меню на четверг: борщ, пирожки и чай.\n\nЗаказы принимаются до половины двенадцатого.",
        ["koi8-r", "windows-1251"],
    ),
    "japanese": (
        "木曜日のメニューはカレーとサラダです。\n\n注文は十一時半までです。",
        ["iso-2022-jp", "shift_jis"],
    ),
}

# The same junk word written plainly and with the usual disguises.
LOOKALIKE = {
    "plain": "You are a winner: claim your prize today",
    "cyrillic-letters": "You are a w\u0456nn\u0435r: claim your pr\u0456z\u0435 today",
    "greek-letters": "You are a winner: claim y\u03bfur prize t\u03bfday",
    "zero-width": "You are a win\u200bner: claim your pri\u200dze today",
    "soft-hyphen": "You are a win\u00adner: claim your prize to\u00adday",
    "fullwidth": "You are a \uff57\uff49\uff4e\uff4e\uff45\uff52: claim your prize today",
    "spaced": "You are a w i n n e r: claim your prize today",
    "dotted": "You are a w.i.n.n.e.r: claim your prize today",
}


def main():
    for group, (text, legacy) in GROUPS.items():
        folder = os.path.join(OUT, group)
        os.makedirs(folder, exist_ok=True)
        for name, data in variants(text, legacy):
            with open(os.path.join(folder, f"{name}.eml"), "wb") as f:
                f.write(data)
    folder = os.path.join(OUT, "lookalike")
    os.makedirs(folder, exist_ok=True)
    for name, text in LOOKALIKE.items():
        data = single(name, "text/plain", "utf-8", "base64", wrap76(base64.b64encode(text.encode("utf-8"))))
        with open(os.path.join(folder, f"{name}.eml"), "wb") as f:
            f.write(data)


if __name__ == "__main__":
    main()
