"""Reading level of the public pages: Flesch-Kincaid grade and Flesch reading ease.

Formulas (Kincaid et al. 1975; Flesch 1948):

    grade = 0.39 * words / sentences + 11.8 * syllables / words - 15.59
    ease  = 206.835 - 1.015 * words / sentences - 84.6 * syllables / words

What is counted on a page (our conventions, stated so results can be reproduced):

- the prose of ``<main>``: paragraphs, list items, callouts and headings; each of these blocks
  ends a sentence even without a full stop. Tables, code, forms, anything inside an element marked
  ``fg-appendix`` (the technical appendix, written for analysts) and lists marked ``fg-names``
  (lists of page or unit names, such as the search page's) are left out;
- numbers are read aloud before counting ("14.2%" is "fourteen point two percent"), so a page
  full of figures is not scored as easier than it reads;
- syllables come from a vowel-group rule with the usual English corrections (silent final e,
  "-le", "-ed" after most consonants) plus a small table of exceptions; see ``syllables``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from html.parser import HTMLParser

# US school grade for patient materials (NIH guidance, cited in Rooney et al. 2021)
GRADE_LIMIT = 8.0

_ONES = [
    "zero",
    "one",
    "two",
    "three",
    "four",
    "five",
    "six",
    "seven",
    "eight",
    "nine",
    "ten",
    "eleven",
    "twelve",
    "thirteen",
    "fourteen",
    "fifteen",
    "sixteen",
    "seventeen",
    "eighteen",
    "nineteen",
]
_TENS = ["", "", "twenty", "thirty", "forty", "fifty", "sixty", "seventy", "eighty", "ninety"]


def _spoken_integer(n: int) -> list[str]:
    if n < 20:
        return [_ONES[n]]
    if n < 100:
        return [_TENS[n // 10]] + ([_ONES[n % 10]] if n % 10 else [])
    for size, name in (
        (10**9, "billion"),
        (10**6, "million"),
        (1000, "thousand"),
        (100, "hundred"),
    ):
        if n >= size:
            head, rest = divmod(n, size)
            return _spoken_integer(head) + [name] + (_spoken_integer(rest) if rest else [])
    raise AssertionError(n)


_NUMBER = re.compile(r"(\d[\d,]*)(?:\.(\d+))?(%?)")


def spoken_number(token: str) -> list[str]:
    """A number as read aloud: '14.2%' -> fourteen point two percent; '1,234' -> one thousand two
    hundred thirty four."""
    m = _NUMBER.fullmatch(token)
    if not m:
        return []
    whole = int(m.group(1).replace(",", "")) if m.group(1).replace(",", "") else 0
    words = _spoken_integer(whole) if whole < 10**12 else ["a", "very", "large", "number"]
    if m.group(2):
        words += ["point"] + [_ONES[int(d)] for d in m.group(2)]
    if m.group(3):
        words.append("percent")
    return words


# Words the vowel-group rule miscounts, with their syllable counts (dictionary pronunciations).
_EXCEPTIONS = {
    "area": 3,
    "being": 2,
    "business": 2,
    "every": 2,
    "everyone": 3,
    "idea": 3,
    "ideas": 3,
    "people": 2,
    "real": 2,
    "really": 3,
    "create": 2,
    "created": 3,
    "science": 2,
    "quiet": 2,
    "period": 3,
    "periods": 3,
    "readmitted": 4,
    "readmission": 4,
    "readmissions": 4,
    "reuse": 2,
    "various": 3,
    "serious": 3,
    "previous": 3,
    "obvious": 3,
    "average": 3,
    "averages": 4,
    "different": 3,
    "interest": 3,
    "several": 3,
    "evening": 3,
    "whether": 2,
    "where": 1,
    "there": 1,
    "here": 1,
    "were": 1,
    "one": 1,
    "once": 1,
    "done": 1,
    "gone": 1,
    "some": 1,
    "come": 1,
    "become": 2,
    "give": 1,
    "live": 1,
    "have": 1,
    "site": 1,
    "sites": 1,
    "more": 1,
    "fewer": 2,
    "lower": 2,
    "higher": 2,
    "chosen": 2,
    "years": 1,
    "year": 1,
    "patient": 2,
    "patients": 2,
    "estimate": 3,
    "estimates": 3,
    "estimated": 4,
    "fairgauge": 2,
    "network": 2,
    "networks": 2,
}
_VOWELS = re.compile(r"[aeiouy]+")


def syllables(word: str) -> int:
    """Syllables in an English word (vowel groups, corrected for common silent letters)."""
    w = re.sub(r"[^a-z]", "", word.lower())
    if not w:
        return 0
    if w in _EXCEPTIONS:
        return _EXCEPTIONS[w]
    if len(w) <= 3:
        return 1
    n = len(_VOWELS.findall(w))
    if w.endswith("e") and not w.endswith(("le", "ee", "ye")) and n > 1:
        n -= 1  # silent final e: "rate", "case"
    elif w.endswith("es") and not re.search(r"(s|x|z|ch|sh|c|g)es$", w) and n > 1:
        n -= 1  # "rates", "units'" -> one less; "cases", "changes" keep it
    elif w.endswith("ed") and not re.search(r"[td]ed$", w) and n > 1:
        n -= 1  # "pulled", "based"; "adjusted", "recorded" keep it
    # two sounds: "variable", "period", "actual"
    n += len(re.findall(r"(?<![ct])ia|(?<![cts])io|eo|ua|uo", w))
    return max(1, n)


_WORD = re.compile(r"[A-Za-z]+(?:['’][A-Za-z]+)*|\d[\d,]*(?:\.\d+)?%?")
_SENTENCE_END = re.compile(r"(?<=[.!?])[\"')\]]*\s+(?=[\"'(\[]?[A-Z0-9])")


@dataclass(frozen=True)
class Counts:
    words: int
    sentences: int
    syllables: int

    @property
    def grade(self) -> float:
        return grade(self.words, self.sentences, self.syllables)

    @property
    def ease(self) -> float:
        return ease(self.words, self.sentences, self.syllables)


def grade(words: int, sentences: int, syllable_count: int) -> float:
    """Flesch-Kincaid grade level (Kincaid et al. 1975)."""
    return 0.39 * words / sentences + 11.8 * syllable_count / words - 15.59


def ease(words: int, sentences: int, syllable_count: int) -> float:
    """Flesch reading ease (Flesch 1948)."""
    return 206.835 - 1.015 * words / sentences - 84.6 * syllable_count / words


def count(blocks: list[str]) -> Counts:
    """Words, sentences and syllables in blocks of prose (each block ends at least one sentence)."""
    words = sentences = syl = 0
    for block in blocks:
        block = " ".join(block.split())
        parts = [p for p in _SENTENCE_END.split(block) if _WORD.search(p)]
        sentences += len(parts)
        for token in _WORD.findall(block):
            spoken = spoken_number(token) if token[0].isdigit() else [token]
            words += len(spoken)
            syl += sum(syllables(w) for w in spoken)
    return Counts(words, sentences, syl)


_BLOCKS = {"p", "li", "h1", "h2", "h3", "h4", "dt", "dd", "caption", "figcaption", "blockquote"}
_SKIP = {
    "table",
    "pre",
    "code",
    "nav",
    "script",
    "style",
    "header",
    "footer",
    "svg",
    "form",
    "button",
    "select",
    "label",
}
_VOID = {
    "br",
    "img",
    "hr",
    "input",
    "meta",
    "link",
    "source",
    "wbr",
    "area",
    "col",
    "embed",
    "param",
    "track",
}


class _Prose(HTMLParser):
    """Collect the prose blocks of ``<main>``, skipping tables, code, figures and the technical
    appendix."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack: list[tuple[str, bool]] = []  # (tag, skipped)
        self.in_main = 0
        self.blocks: list[str] = []
        self.current: list[str] | None = None

    def _skipping(self) -> bool:
        return any(skipped for _, skipped in self.stack)

    def handle_starttag(self, tag, attrs):
        if tag in _VOID:
            return
        classes = (dict(attrs).get("class") or "").split()
        skipped = (
            tag in _SKIP
            or "fg-appendix" in classes
            or "fg-names" in classes
            or dict(attrs).get("hidden") is not None
        )
        self.stack.append((tag, skipped))
        if tag == "main":
            self.in_main += 1
        if tag in _BLOCKS and self.in_main and not self._skipping():
            self._flush()
            self.current = []

    def handle_endtag(self, tag):
        if tag in _VOID:
            return
        while self.stack:
            top, _ = self.stack.pop()
            if top == "main":
                self.in_main -= 1
            if top in _BLOCKS:
                self._flush()
            if top == tag:
                break

    def handle_data(self, data):
        if self.in_main and not self._skipping():
            if self.current is None:
                self.current = []
            self.current.append(data)

    def _flush(self):
        if self.current:
            text = " ".join("".join(self.current).split())
            if text:
                self.blocks.append(text)
        self.current = None


def prose(html: str) -> list[str]:
    """The blocks of a page's prose that the reading level is measured on."""
    parser = _Prose()
    parser.feed(html)
    parser.close()
    parser._flush()
    return parser.blocks


def page_level(html: str) -> Counts:
    return count(prose(html))
