"""Generate the embedded demo data: an invented language, its grammar, and corpora sampled from it.

Scenario. Kethrava is an imaginary trading settlement at the fork of the river Ulmesk. Its clerks
keep tally-books in Kethravi, a language invented for this demo: who loaded which barge, what the
salt cost, who swore that the toll was paid. Every word form, name and gloss below was made up for
it. Kethravi is head-final: subject-object-verb order, postpositions (`ko pirnak ma`, "at the
jetty"), a possessor particle after the possessor (`sa Orvek vo brosk`, "Orvek's barge"),
relative clauses before the noun (`ko tulm dorvik eth ko domhar`, "the merchant who bought the
salt"), and complement and adverbial clauses closed by their particle (`... tullik hollo`, "when
... arrived"). Verbs carry tense: past `-ik`, future `-esh`. Proper names take an article (`sa`,
or the honorific `ul`). Each entry ends with `.`, or `!` for alarming news.

The generating grammar is a PCFG in Chomsky normal form with 10 phrasal categories and 16
part-of-speech tags (the tags are the preterminals), written to `grammar.pcfg`. Sentences are
drawn top-down from it with `treewright.inference.generate` under the fixed seed `SEED`; draws
longer than `MAX_WORDS` tokens are redrawn by the generator itself, and drawn sentences shorter
than `MIN_WORDS` are left out (counted; the grammar's shortest sentence has four tokens, so none
are). Lengths count every token, the final mark included. The first `SIZES["train"]` sentences
are the training corpus (raw text only), the next `SIZES["dev"]` the dev set and the next
`SIZES["test"]` the test set (gold trees and raw text).

Outputs (in `--out`, by default the package's own `src/treewright/data/demo/`):
    grammar.pcfg   the generating grammar: the ceiling model
    lexicon.tsv    form, tag and English gloss of every word
    train.txt      raw training sentences, one per line, tokens separated by single spaces
    dev.txt        raw dev sentences;   dev.trees   their gold trees, one bracketed tree per line
    test.txt       raw test sentences;  test.trees  their gold trees
The README.md beside them is written by hand. Regenerate with:

    .venv/bin/python scripts/make_demo_data.py

The output is deterministic: `tests/test_demo_data.py` regenerates into a temporary folder and
compares the bytes with the shipped files.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from treewright.grammar import load_grammar
from treewright.inference import generate
from treewright.trees import Tree

SEED = 1187
MIN_WORDS = 3
MAX_WORDS = 20
SIZES = {"train": 2000, "dev": 200, "test": 200}
# Draw a tenth more than needed so that the length filter can never leave the sets short.
OVERDRAW = 1.1
DEFAULT_OUT = Path(__file__).resolve().parents[1] / "src" / "treewright" / "data" / "demo"

# Probabilities are written with six decimals; each left-hand side sums to exactly 10**6 units.
UNITS = 10 ** 6

# ---- the lexicon ---------------------------------------------------------------------------
# (form, gloss) per part-of-speech tag, most frequent first: within a tag, word probabilities
# fall off as 1 / (rank + 2), a Zipf-like shape that keeps the rarest words seen a few times
# in the training corpus.

LEXICON: dict[str, list[tuple[str, str]]] = {
    "DET": [("ko", "the"), ("vesh", "this"), ("tamu", "that"), ("ilo", "some"),
            ("hesk", "every"), ("drai", "another")],
    "ART": [("sa", "article before a name"), ("ul", "honorific article before a name")],
    "NAME": [(name, "a name") for name in (
        "Orvek", "Talishe", "Mennoch", "Drisva", "Kettelun", "Habrin", "Voskary", "Ilmeth",
        "Surrowe", "Pendrak", "Yaskel", "Morrith", "Ebbelin", "Quessa", "Tornavi", "Haskerel",
        "Lumbrod", "Ossvyn", "Varrun", "Imbresh")],
    "N": [("brosk", "barge"), ("tulm", "salt"), ("karrun", "barrel"), ("dessi", "coin"),
          ("voleth", "ferry"), ("pirnak", "jetty"), ("havra", "rope"), ("suttel", "sack"),
          ("ambri", "grain"), ("lossim", "wool"), ("norrup", "fish"), ("ivvel", "eel"),
          ("taddo", "oar"), ("semmet", "sail"), ("hulvi", "reed"), ("kendral", "timber"),
          ("mubbet", "mill"), ("gastrov", "storehouse"), ("vinnak", "toll"),
          ("riskel", "ledger"), ("domhar", "merchant"), ("skavvi", "boatman"),
          ("lentroe", "ferrywoman"), ("pettis", "clerk"), ("wembel", "weigher"),
          ("yorrin", "pilot"), ("kimmu", "child"), ("hubbo", "dog"), ("gessit", "goat"),
          ("marrak", "mule"), ("zeppa", "cart"), ("brennok", "bridge"), ("hathmar", "ford"),
          ("ulvek", "riverbank"), ("sebbro", "shoal"), ("duvvan", "flood"), ("ellum", "fog"),
          ("pattar", "rain"), ("hoshen", "wind"), ("tirrel", "dawn"), ("vennic", "dusk"),
          ("sorvel", "market"), ("lumbet", "lantern"), ("krell", "hook"), ("gavvo", "net"),
          ("kostrel", "crate"), ("ombesh", "honey"), ("lissov", "oil"), ("drevvi", "cheese"),
          ("pelloch", "tar"), ("nuddet", "nail"), ("hebbon", "hide"), ("sillun", "cloth"),
          ("rovvet", "dye"), ("kappu", "pot"), ("dinnol", "bell"), ("gorrund", "guard"),
          ("skeddi", "thief"), ("vurrek", "debt"), ("tressil", "seal")],
    "ADJ": [("orrum", "old"), ("sesk", "new"), ("bullom", "heavy"), ("pipri", "light"),
            ("vaddo", "wet"), ("kirrit", "dry"), ("emmet", "red"), ("dushko", "black"),
            ("tikkel", "small"), ("hoggar", "large"), ("lummo", "full"), ("vessu", "empty"),
            ("dappen", "cheap"), ("krommal", "costly"), ("pussek", "rotten"),
            ("ostel", "sound"), ("ferrin", "swift"), ("lobbod", "slow"),
            ("hulmeni", "northern"), ("sorrani", "southern"), ("krattel", "broken"),
            ("tulmesh", "salted"), ("sippra", "leaking"), ("ganno", "sealed")],
    "NUM": [("dorra", "two"), ("tesh", "three"), ("ivu", "one"), ("kammo", "four"),
            ("pelli", "five"), ("dekkar", "ten"), ("suddo", "six"), ("vorro", "seven"),
            ("hettu", "eight"), ("nimmo", "nine")],
    "GEN": [("vo", "possessor particle")],
    "POST": [("ma", "at"), ("urru", "from"), ("sib", "toward"), ("tel", "on"),
             ("kel", "with"), ("orro", "across"), ("dok", "under"), ("bem", "beside"),
             ("nis", "for"), ("tasso", "behind")],
    "ADV": [("tasken", "yesterday"), ("hoddo", "today"), ("morrel", "tomorrow"),
            ("ibbe", "again"), ("lekka", "soon"), ("ommar", "already"), ("dorrit", "late"),
            ("dorrai", "twice"), ("shalla", "quietly"), ("pemmi", "often"),
            ("nokko", "never"), ("tavva", "there")],
    "COMP": [("tuv", "that (complement clause)"), ("enni", "that, so it is said")],
    "SUB": [("hollo", "when"), ("brun", "because"), ("lamme", "until"),
            ("oskeni", "although")],
    "REL": [("eth", "relative particle")],
    "PUNCT": [(".", "end of entry"), ("!", "end of an alarming entry")],
}
# Fixed (not Zipf) word probabilities where the tag has a clear favourite, in units.
FIXED_WEIGHTS = {"ART": [700_000, 300_000], "COMP": [800_000, 200_000],
                 "PUNCT": [950_000, 50_000]}

# Verbs: (stem, gloss) per tag; each stem has a past form (stem + "ik") and a future form
# (stem + "esh"). Logbooks mostly record what happened, so the past is three times as likely.
VERB_STEMS: dict[str, list[tuple[str, str]]] = {
    "VT": [("dorv", "buy"), ("hamm", "sell"), ("brett", "carry"), ("lurr", "load"),
           ("kuvv", "unload"), ("pesk", "weigh"), ("ravv", "count"), ("dess", "pay"),
           ("vurr", "owe"), ("gettl", "mend"), ("skedd", "steal"), ("vinn", "see"),
           ("hald", "tow"), ("gastr", "store"), ("lom", "find"), ("pirr", "lose"),
           ("vol", "ferry"), ("havv", "tie"), ("tromm", "send"), ("yatt", "hire")],
    "VI": [("tull", "arrive"), ("vor", "depart"), ("dubb", "sink"), ("hemm", "sleep"),
           ("lann", "wait"), ("ekk", "rise"), ("dost", "fall"), ("siv", "drift"),
           ("semm", "sail"), ("puss", "rot"), ("grall", "shout"), ("tork", "work")],
    "VS": [("mell", "say"), ("oss", "hear"), ("risk", "write"), ("vaun", "swear"),
           ("hadd", "reckon"), ("krum", "fear")],
}
TENSES = [("ik", "past", 0.75), ("esh", "future", 0.25)]

# ---- the phrase rules ------------------------------------------------------------------------
# (lhs, left, right, probability in units, head child). S is the start symbol. Recursion runs
# through CL (adverbial and complement clauses), VP (adjunct stacking) and NP (possessors,
# relative clauses); the probabilities keep it subcritical, so trees stay small (mean 8.6
# tokens).
#
# The head child ("left" or "right") gives each sentence its true dependency tree (the head
# word of the head child heads the head word of the other child;
# scripts/make_headed_language.py writes them). Content words head, as in Universal
# Dependencies (common practice): the verb heads its clause, the noun its phrase, and each
# particle (postposition, possessor particle, complementizer, subordinator, relative particle)
# depends on the content word of the phrase it closes; the final mark depends on the clause's
# verb. So heads come last except in the five particle rules and S.

PHRASE_RULES: list[tuple[str, str, str, int, str]] = [
    ("S", "CL", "PUNCT", 1_000_000, "left"),    # an entry is a clause and its final mark
    ("CL", "NP", "VP", 640_000, "right"),       # subject, predicate
    ("CL", "NP", "VI", 180_000, "right"),       # subject, intransitive verb
    ("CL", "ADV", "CL", 100_000, "right"),      # fronted time adverb
    ("CL", "SBAR", "CL", 80_000, "right"),      # fronted adverbial clause
    ("VP", "NP", "VT", 520_000, "right"),       # object, transitive verb
    ("VP", "PP", "VP", 150_000, "right"),       # adjunct before the predicate
    ("VP", "PP", "VI", 130_000, "right"),
    ("VP", "ADV", "VP", 50_000, "right"),
    ("VP", "ADV", "VI", 50_000, "right"),
    ("VP", "CP", "VS", 100_000, "right"),       # complement clause, speech or thought verb
    ("NP", "DET", "N", 330_000, "right"),
    ("NP", "DET", "NOM", 110_000, "right"),
    ("NP", "ART", "NAME", 200_000, "right"),
    ("NP", "NUM", "N", 80_000, "right"),
    ("NP", "NUM", "NOM", 30_000, "right"),
    ("NP", "ADJ", "N", 60_000, "right"),        # bare adjective and noun: an indefinite mass
    ("NP", "POSS", "N", 90_000, "right"),
    ("NP", "POSS", "NOM", 30_000, "right"),
    ("NP", "RC", "NP", 70_000, "right"),        # relative clause before the noun phrase
    ("NOM", "ADJ", "N", 850_000, "right"),
    ("NOM", "ADJ", "NOM", 150_000, "right"),
    ("POSS", "NP", "GEN", 1_000_000, "left"),
    ("PP", "NP", "POST", 1_000_000, "left"),
    ("CP", "CL", "COMP", 1_000_000, "left"),
    ("SBAR", "CL", "SUB", 1_000_000, "left"),
    ("RC", "VP", "REL", 1_000_000, "left"),    # subject-gap relative: "who bought the salt"
]


def zipf_units(count: int) -> list[int]:
    """`count` weights proportional to 1 / (rank + 2), in units summing to exactly UNITS.
    The rounding remainder goes to the most frequent item."""
    raw = [1.0 / (rank + 2) for rank in range(count)]
    total = sum(raw)
    units = [round(UNITS * r / total) for r in raw]
    units[0] += UNITS - sum(units)
    return units


def lexicon_entries() -> dict[str, list[tuple[str, str, int]]]:
    """Per tag, (form, gloss, probability in units) for every word; units sum to UNITS."""
    out: dict[str, list[tuple[str, str, int]]] = {}
    for tag, words in LEXICON.items():
        units = FIXED_WEIGHTS.get(tag) or zipf_units(len(words))
        assert len(units) == len(words) and sum(units) == UNITS, tag
        out[tag] = [(form, gloss, u) for (form, gloss), u in zip(words, units)]
    for tag, stems in VERB_STEMS.items():
        entries = []
        for (stem, gloss), stem_units in zip(stems, zipf_units(len(stems))):
            for suffix, tense, share in TENSES:
                entries.append((stem + suffix, f"{gloss} ({tense})", round(stem_units * share)))
        # Rounding the tense shares can miss the total by a unit or two; the first form takes it.
        form, gloss, units = entries[0]
        entries[0] = (form, gloss, units + UNITS - sum(u for _, _, u in entries))
        out[tag] = entries
    return out


def fmt_units(units: int) -> str:
    return f"{units / UNITS:.6f}"


def grammar_text() -> str:
    """The generating grammar in the grammar text format, with section comments."""
    lines = ["# Kethravi, the invented language of the tally-books of Kethrava (a demo PCFG).",
             "# Written by scripts/make_demo_data.py; see README.md beside this file.",
             "@start S", "", "# phrase rules"]
    totals: dict[str, int] = {}
    for lhs, left, right, units, _ in PHRASE_RULES:
        totals[lhs] = totals.get(lhs, 0) + units
        lines.append(f"{lhs} -> {left} {right} {fmt_units(units)}")
    assert all(t == UNITS for t in totals.values()), totals
    for tag, entries in lexicon_entries().items():
        lines.extend(["", f"# {tag}"])
        lines.extend(f'{tag} -> "{form}" {fmt_units(units)}' for form, _, units in entries)
    return "\n".join(lines) + "\n"


def lexicon_text() -> str:
    rows = ["form\ttag\tgloss"]
    for tag, entries in lexicon_entries().items():
        rows.extend(f"{form}\t{tag}\t{gloss}" for form, gloss, _ in entries)
    return "\n".join(rows) + "\n"


def sample_sets(grammar_path: Path, seed: int = SEED) -> tuple[dict[str, list[Tree]], int]:
    """The train, dev and test trees drawn from the grammar, and how many of all the draws the
    length filter left out (reported, never hidden). The unused surplus draws are discarded."""
    grammar = load_grammar(grammar_path)
    needed = sum(SIZES.values())
    drawn = generate(grammar, int(needed * OVERDRAW), seed=seed, max_words=MAX_WORDS)
    kept = [t for t in drawn if MIN_WORDS <= len(t.leaves()) <= MAX_WORDS]
    if len(kept) < needed:
        raise RuntimeError(f"only {len(kept)} of {len(drawn)} draws have {MIN_WORDS} to "
                           f"{MAX_WORDS} tokens; {needed} are needed")
    sets, start = {}, 0
    for name, size in SIZES.items():
        sets[name] = kept[start:start + size]
        start += size
    return sets, len(drawn) - len(kept)


def write_demo_data(out_dir: Path, seed: int = SEED) -> dict[str, int]:
    """Write every generated file into `out_dir` (created if missing). Returns the sentence
    count per file and the number of draws that the length filter left out."""
    out_dir.mkdir(parents=True, exist_ok=True)
    grammar_path = out_dir / "grammar.pcfg"
    grammar_path.write_text(grammar_text(), encoding="utf-8")
    (out_dir / "lexicon.tsv").write_text(lexicon_text(), encoding="utf-8")
    sets, filtered = sample_sets(grammar_path, seed)
    counts = {"filtered_out": filtered}
    for name, trees in sets.items():
        raw = "".join(" ".join(t.leaves()) + "\n" for t in trees)
        (out_dir / f"{name}.txt").write_text(raw, encoding="utf-8")
        counts[f"{name}.txt"] = len(trees)
        if name != "train":
            text = "".join(t.to_string() + "\n" for t in trees)
            (out_dir / f"{name}.trees").write_text(text, encoding="utf-8")
            counts[f"{name}.trees"] = len(trees)
    return counts


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description="Regenerate the Kethravi demo grammar and corpora.",
        epilog="example:\n  .venv/bin/python scripts/make_demo_data.py --out /tmp/demo",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT,
                        help=f"output folder (default: {DEFAULT_OUT})")
    parser.add_argument("--seed", type=int, default=SEED,
                        help=f"sampling seed (default: {SEED}, the shipped data's)")
    args = parser.parse_args(argv)
    counts = write_demo_data(args.out, args.seed)
    for name, count in counts.items():
        print(f"{name}: {count}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
