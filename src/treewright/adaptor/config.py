"""The typed schema of a word-segmentation run (`treewright segment CONFIG.yaml`): the unigram
word adaptor grammar (`adaptor.grammars`) sampled over unsegmented utterances.

The defaults of the grammar (Pitman-Yor discount 0.5, concentration 10, even odds of another
word and of another character) are the ones `scripts/segment_invented_language.py` chose
before any run; they are not tuned.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Literal, Sequence

from treewright.config import ConfigError, ConfigProblem, load_config, option


@dataclass
class SegmentDataConfig:
    text: Path = option(doc="Utterances, one per line (UTF-8). The sampler sees each line's "
                            "characters with its white space taken out; blank lines are "
                            "counted and skipped. With format conllu, a CoNLL-U file.")
    format: Literal["lines", "conllu"] = option(
        "lines", "lines: one utterance (or with grammar.unit morphs, one word) per line. "
                 "conllu: the distinct written words of a CoNLL-U file, punctuation out and "
                 "lowercased, each once; the tokens a word is written as are its gold morphs "
                 "(needs grammar.unit morphs).")
    gold: bool = option(True, "The spaces of each line are its gold segmentation: boundary "
                              "and token F1 are logged. false: the spaces are only taken out.")
    case_rules: Literal["default", "turkic"] = option(
        "default", "How format conllu lowercases words and their gold morphs: default, "
                   "Unicode's language-independent mapping; turkic, the Turkish and "
                   "Azerbaijani rules (I to dotless i, dotted capital I to i).")


@dataclass
class WordGrammarConfig:
    unit: Literal["words", "morphs"] = option(
        "words", "words: the unigram word grammar over utterances. morphs: each input is one "
                 "word, cut into Prefixes, a Stem and Suffixes, all adapted with discount and "
                 "concentration below (adaptor.grammars.morph_grammar).")
    discount: float = option(0.5, "Pitman-Yor discount a of the adapted Word.", range="[0, 1)")
    concentration: float = option(10.0, "Pitman-Yor concentration b of Word (b > -a).",
                                  range="(-1, inf)")
    more_words: float = option(0.5, "Probability that another word follows.", range="(0, 1)")
    more_characters: float = option(0.5, "Probability that a word goes on with another "
                                         "character (the base spells words out); with unit "
                                         "morphs, that a stem or suffix does.",
                                    range="(0, 1)")
    more_suffixes: float = option(0.5, "Unit morphs: probability that a suffix follows the "
                                       "stem, and that another follows a suffix.",
                                  range="(0, 1)")
    submorphs: bool = option(True, "Unit morphs: a stem or suffix may also be built of two or "
                                   "more adapted SubMorph pieces (even odds against spelling "
                                   "it out), so a rare stem can reuse recurring pieces and "
                                   "stay whole; SubMorph edges are not cuts "
                                   "(adaptor.grammars.morph_grammar; docs/adaptor_notes.md).")
    prefixes: bool = option(True, "Unit morphs: adapted Prefixes may also precede the stem, "
                                  "so that a language that affixes at the front of the word "
                                  "is cut there too; false for a language known to have "
                                  "suffixes only (adaptor.grammars.morph_grammar; "
                                  "docs/adaptor_notes.md).")
    more_prefixes: float = option(0.5, "Unit morphs with prefixes: probability that a prefix "
                                       "precedes the stem, and that another precedes a "
                                       "prefix.", range="(0, 1)")


@dataclass
class SamplerConfig:
    sweeps: int = option(200, "Sweeps of every chain; a sweep resamples each utterance once "
                              "(one Metropolis-Hastings step).", range="[0, inf)")
    chains: int = option(1, "Independent chains, run one after another; the metrics and "
                         "lexicon are those of the chain with the highest log joint "
                         "probability (the model's choice, not the gold's), every chain's "
                         "log joint is logged, and the segmentation pools every chain's "
                         "recorded analyses (samples).", range="[1, inf)")
    seed: int = option(0, "Seeds every chain (chain c draws from the c-th child seed).")
    start: Literal["batch", "incremental"] = option(
        "batch", "First state. batch: every utterance's tree drawn from the base grammar "
                 "alone. incremental: each drawn given the utterances before it (fixes early "
                 "chance units in place; see docs/adaptor_notes.md).")
    checkpoint_every: int = option(10, "Sweeps between checkpoints (chains.json); --resume "
                                       "continues from the last one.", range="[1, inf)")
    anneal_from: float = option(1.0, "Temperature of the first sweep; it falls linearly to 1 "
                                     "over anneal_sweeps sweeps (1: no annealing).",
                                range="[1, inf)")
    anneal_sweeps: int = option(0, "Sweeps over which the temperature falls to 1.",
                                range="[0, inf)")
    resample_hyperparameters: bool = option(
        False, "After every sweep, slice-sample each adapted symbol's discount and "
               "concentration from their posterior (priors Beta(1, 1) and Gamma(10, 0.1); "
               "needs both positive at the start).")
    samples: int = option(10, "Recorded analyses per chain for the segmentation written at "
                              "the end: every chain's state after the last sweep and after "
                              "every sample_every-th sweep before it, pooled as cut_rule "
                              "says (the boundary posterior, adaptor.posterior). 0: the "
                              "reported chain's last state alone.", range="[0, inf)")
    sample_every: int = option(2, "Sweeps between recorded analyses.", range="[1, inf)")
    cut_rule: Literal["majority", "expected-f1"] = option(
        "majority", "How the recorded analyses decide the segmentation. majority: cut a "
                    "position when more than half of them cut it (fewest expected wrong "
                    "positions). expected-f1: cut the positions whose count reaches the "
                    "threshold with the highest expected boundary F1 under them (the model's "
                    "posterior alone, never the gold; adaptor.posterior).")
    score_every: int = option(1, "Sweeps between metric lines (log joint probability, and F1 "
                                 "with gold); the log joint costs about a fifth of a sweep.",
                              range="[1, inf)")


@dataclass
class SegmentOutputConfig:
    run_dir: Path | None = option(None, "Run folder; null uses runs/<config file name>.")
    stdout_metrics: bool = option(True, "Print each metric line on standard output.")
    tensorboard: bool = option(True, "Also write every metric line as TensorBoard scalars "
                                     "(the log posterior curve is log_joint), under "
                                     "tensorboard/ in the run folder.")


@dataclass
class SegmentConfig:
    data: SegmentDataConfig = option(doc="The utterances.")
    grammar: WordGrammarConfig = option(WordGrammarConfig(), "The unigram word grammar.")
    sampler: SamplerConfig = option(SamplerConfig(), "The Metropolis-Hastings chains.")
    output: SegmentOutputConfig = option(SegmentOutputConfig(), "Run folder and logging.")


def load_segment_config(path: str | Path | None, overrides: Sequence[str] = ()
                        ) -> SegmentConfig:
    """The checked config (ConfigError lists every problem at once)."""
    cfg = load_config(SegmentConfig, path, overrides, resolve_paths=True)
    source = None if path is None else str(path)
    problems = []
    if not cfg.grammar.concentration > -cfg.grammar.discount:
        problems.append(ConfigProblem(
            "grammar.concentration", f"must exceed minus the discount "
            f"(-{cfg.grammar.discount}), as the Pitman-Yor process needs", source))
    if cfg.sampler.resample_hyperparameters and not (cfg.grammar.discount > 0 and
                                                     cfg.grammar.concentration > 0):
        problems.append(ConfigProblem(
            "sampler.resample_hyperparameters", "the priors need a discount and a "
            "concentration above 0 to start from", source))
    if cfg.data.format == "conllu" and cfg.grammar.unit != "morphs":
        problems.append(ConfigProblem(
            "data.format", "conllu input is the written words of the file, for grammar.unit "
            "morphs", source))
    if problems:
        raise ConfigError(problems, path=source)
    return cfg
