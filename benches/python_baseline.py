#!/usr/bin/env python3
"""Python baseline for the extraction benchmark: the same work as
examples/extract_throughput.rs, done with the standard `email` package and scikit-learn.

Usage: python_baseline.py DIR [PASSES] [--sublinear]

For every *.eml under DIR (read into memory first; reading is not timed):
  parse       email.message_from_bytes(raw, policy=email.policy.default)
  extract     the Subject header, and get_body(preferencelist=('plain', 'html'))
              .get_content(), with HTML reduced to text by an html.parser-based extractor
  transform   HashingVectorizer(ngram_range=(1, 2), n_features=2**20,
              alternate_sign=False, norm='l2') over all texts of the pass

HashingVectorizer has no sublinear_tf option, so by default it weights raw counts, while
tamis uses 1 + log(tf). --sublinear adds TfidfTransformer(use_idf=False,
sublinear_tf=True) after an unnormalised HashingVectorizer, which computes the same
weighting as tamis at a small extra cost.

One untimed warm-up pass, then PASSES timed passes (default 5); prints one JSON line with the
keys of the Rust example: impl, messages, bytes, seconds (per pass), mb_per_s, msgs_per_s.
"""

import json
import os
import sys
import time
from email import message_from_bytes, policy
from html.parser import HTMLParser

from sklearn.feature_extraction.text import HashingVectorizer, TfidfTransformer


class _TextExtractor(HTMLParser):
    """Collects the text a reader would see: character data outside script and style."""

    _SKIP = {"script", "style", "head", "title"}
    _BREAK = {"p", "br", "div", "tr", "li", "h1", "h2", "h3", "td", "table"}

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.parts = []
        self._skip_depth = 0

    def handle_starttag(self, tag, attrs):
        if tag in self._SKIP:
            self._skip_depth += 1
        elif tag in self._BREAK:
            self.parts.append("\n")

    def handle_endtag(self, tag):
        if tag in self._SKIP and self._skip_depth > 0:
            self._skip_depth -= 1

    def handle_data(self, data):
        if self._skip_depth == 0:
            self.parts.append(data)


def html_to_text(html):
    parser = _TextExtractor()
    parser.feed(html)
    parser.close()
    return "".join(parser.parts)


def extract(raw):
    msg = message_from_bytes(raw, policy=policy.default)
    subject = str(msg.get("subject", ""))
    body = msg.get_body(preferencelist=("plain", "html"))
    text = ""
    if body is not None:
        try:
            text = body.get_content()
        except (LookupError, ValueError, AssertionError):
            # Unknown charset or a malformed part: decode leniently, as a mail reader would.
            payload = body.get_payload(decode=True) or b""
            text = payload.decode("utf-8", "replace")
        if body.get_content_subtype() == "html":
            text = html_to_text(text)
    return subject + "\n" + text


def collect(root):
    paths = []
    for dirpath, _dirs, files in os.walk(root):
        for name in files:
            if name.endswith(".eml"):
                paths.append(os.path.join(dirpath, name))
    # Same order as the Rust example, which sorts too.
    return sorted(paths)


def main(argv):
    args = [a for a in argv[1:] if not a.startswith("--")]
    sublinear = "--sublinear" in argv
    if not args:
        print(__doc__, file=sys.stderr)
        return 2
    passes = max(1, int(args[1])) if len(args) > 1 else 5
    paths = collect(args[0])
    if not paths:
        print(f"no .eml files under {args[0]}", file=sys.stderr)
        return 2
    messages = []
    for path in paths:
        with open(path, "rb") as f:
            messages.append(f.read())
    total_bytes = sum(len(m) for m in messages)

    if sublinear:
        hasher = HashingVectorizer(
            ngram_range=(1, 2), n_features=2**20, alternate_sign=False, norm=None
        )
        weigher = TfidfTransformer(use_idf=False, sublinear_tf=True, norm="l2")

        def transform(texts):
            return weigher.fit_transform(hasher.transform(texts))

    else:
        hasher = HashingVectorizer(
            ngram_range=(1, 2), n_features=2**20, alternate_sign=False, norm="l2"
        )

        def transform(texts):
            return hasher.transform(texts)

    def one_pass():
        texts = [extract(raw) for raw in messages]
        return transform(texts).nnz

    one_pass()  # warm-up: imports, codec lookups, regex compilation
    start = time.perf_counter()
    for _ in range(passes):
        one_pass()
    seconds = (time.perf_counter() - start) / passes

    import sklearn

    print(
        json.dumps(
            {
                "impl": "python-email+sklearn",
                "messages": len(messages),
                "bytes": total_bytes,
                "seconds": seconds,
                "mb_per_s": total_bytes / 1e6 / seconds,
                "msgs_per_s": len(messages) / seconds,
                "passes": passes,
                "sublinear": sublinear,
                "python": sys.version.split()[0],
                "sklearn": sklearn.__version__,
            }
        )
    )
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
