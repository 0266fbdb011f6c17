"""The typed schema of a training run: every option with its default and allowed values.

`load_train_config(path, overrides)` reads a YAML file over these defaults, applies dotted
`key=value` overrides, and checks everything (field types and ranges, then the rules that tie
options together) before any work starts. `describe_config(TrainConfig)` lists every option.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Literal, Sequence

from treewright.config import (ConfigError, ConfigProblem, config_from_dict, load_config,
                               option)
from treewright.corpus import UD_FUNCTION   # bias.head_list's name for UD's function tags
from treewright.word_pieces import TAG_MODE_PIECE_EPOCHS


@dataclass
class DataConfig:
    train: Path = option(doc="Training corpus (raw text, bracketed trees or CoNLL-U).")
    dev: Path | None = option(None, "Held-out corpus: dev likelihood picks the best restart; "
                                    "with gold trees (brackets, CoNLL-U) dev bracket F1 is "
                                    "reported too.")
    format: Literal["auto", "text", "brackets", "conllu"] = option(
        "auto", "Corpus format of both files; auto looks at the first lines.")
    lowercase: bool = option(False, "Lowercase words before building the vocabulary.")
    case_rules: Literal["default", "turkic"] = option(
        "default", "How lowercase maps capitals: default follows Unicode's language-independent "
                   "rules (I becomes i, and dotted İ becomes i plus a combining dot); turkic "
                   "those of Turkish and Azerbaijani (I becomes ı, İ becomes i).")
    tag_mode: bool = option(False, "Induce over POS tags instead of words (bracketed trees: "
                                   "preterminal labels; CoNLL-U: UPOS).")
    drop_tags: str | None = option(None, "Comma-separated tags whose words are removed from "
                                         "training and dev sentences and trees, e.g. PUNCT "
                                         "(CoNLL-U: UPOS; bracketed trees: preterminal "
                                         "labels); the usual convention before scoring "
                                         "induced trees.")
    min_count: int = option(1, "Words seen fewer times in training share the unknown-word "
                               "token.", range="[1, inf)")
    max_vocab: int | None = option(None, "Largest vocabulary, unknown token included.",
                                   range="[2, inf)")
    max_length: int | None = option(40, "Training sentences longer than this are set aside "
                                        "(counted in the log), since the inside pass costs n^3.",
                                    range="[1, inf)")
    stream_chunk: int | None = option(
        None, "Online EM: read the training corpus in chunks of this many sentences on every "
              "pass instead of holding it in memory, so memory stays flat as the corpus grows; "
              "minibatches are formed (and shuffled) within a chunk.", range="[1, inf)")


@dataclass
class ModelConfig:
    parameterization: Literal["tabular", "neural", "lowrank", "compound",
                              "lexicalized", "independent", "independent-neural"] = option(
        "tabular", "tabular: one parameter per rule; neural: rules from symbol embeddings "
                   "(Kim, Dyer & Rush 2019); lowrank: binary rules as a sum of model.rank "
                   "rank-one terms from embeddings (Yang, Zhao & Tu 2021), for many symbols; "
                   "compound: neural rules that also read a per-sentence latent vector, trained "
                   "by amortized variational inference (Kim, Dyer & Rush 2019); lexicalized: "
                   "every constituent has a head word, and rules read the head and dependent words "
                   "through model.head_classes latent classes, with an explicit back-off to "
                   "symbol-only rules (Yang, Zhao & Tu 2021); independent: one logit per "
                   "parent, side and child, p(A -> B C) = p(B | A, left) p(C | A, right) "
                   "(Liu, Yang, Kim & Tu 2023), for thousands of symbols (also with 'em' and "
                   "'map_em'); independent-neural: the same two factors computed from symbol "
                   "embeddings, as neural computes its rules. All but tabular and independent "
                   "train with 'gradient' only.")
    # 30/60 symbols, dimension 256 and latent size 64 are the published setting of Kim, Dyer &
    # Rush 2019, "Compound Probabilistic Context-Free Grammars for Grammar Induction" (from
    # memory).
    nonterminals: int = option(30, "Number of nonterminals (ignored with a warm start). 30 is "
                                   "the published setting of Kim, Dyer & Rush 2019 (from "
                                   "memory).", range="[1, inf)")
    preterminals: int = option(60, "Number of preterminals (ignored with a warm start). 60 is "
                                   "the published setting of Kim, Dyer & Rush 2019 (from "
                                   "memory).", range="[1, inf)")
    init_scale: float = option(1.0, "Std of the normal logits of a random tabular or "
                                    "independent start; 0 gives the uniform grammar.",
                               range="[0, inf)")
    embedding_dim: int = option(256, "Neural, lowrank, lexicalized and independent-neural: "
                                     "embedding and hidden size. 256 is the published setting "
                                     "of Kim, Dyer & Rush 2019 (from memory).",
                                range="[1, inf)")
    residual_blocks: int = option(2, "Neural, lowrank, lexicalized and independent-neural: "
                                     "residual blocks in the root and word networks.",
                                  range="[0, inf)")
    rank: int = option(200, "Lowrank: number of rank-one terms of the binary rule tensor.",
                       range="[1, inf)")
    head_classes: int = option(16, "Lexicalized: latent classes through which a head word "
                                   "and its dependent meet (the inside pass costs n^4 times "
                                   "this).", range="[1, inf)")
    latent_dim: int = option(64, "Compound: size of the per-sentence latent vector. 64 is "
                                 "the published setting of Kim, Dyer & Rush 2019 (from "
                                 "memory).", range="[1, inf)")
    warm_start: Path | None = option(None, "Start from this hand-written grammar (grammar text "
                                           "format) instead of at random; tabular only.")
    warm_start_mix: float = option(0.0, "Weight of the uniform distribution mixed into every "
                                        "rule of the warm start; 0 keeps its zeros at zero.",
                                   range="[0, 1)")


@dataclass
class MethodConfig:
    method: Literal["em", "online_em", "map_em", "vb", "gradient"] = option(
        "em", "em: batch inside-outside EM; online_em: stepwise EM (Liang & Klein 2009); "
              "map_em: EM with a symmetric Dirichlet prior; vb: mean-field variational Bayes "
              "(Kurihara & Sato 2004); gradient: Adam on the log marginal likelihood.")
    epochs: int = option(30, "Passes over the training data (one EM or VB iteration each).",
                         range="[1, inf)")
    batch_size: int = option(32, "Sentences per inside-outside call; also the minibatch of "
                                 "online EM and of gradient steps.", range="[1, inf)")
    dtype: Literal["float32", "float64"] = option(
        "float32", "Arithmetic precision; float64 makes resumed runs bit-identical and is "
                   "what the exactness tests use.")
    memory_budget_mb: float | None = option(
        None, "Memory for one inside-outside call (chart and gradient, estimated by "
              "treewright.engine.memory): batches are cut to fit, and a sentence that alone "
              "needs more is set aside and reported. null: no budget.", range="(0, inf)")
    seed: int = option(0, "Seeds the initialisation and the data order; every (seed, "
                          "restart) pair has its own random stream, so runs with different "
                          "seeds share no restart.", range="[0, inf)")
    restarts: int = option(1, "Independent random starts; the one with the best dev "
                              "likelihood (training likelihood without a dev set) is kept.",
                           range="[1, inf)")
    tolerance: float = option(0.0, "EM/VB: stop a restart once the objective per word "
                                   "improves by less than this; 0 runs every epoch.",
                              range="[0, inf)")
    shuffle: bool = option(True, "Online EM and gradient: visit batches in a fresh seeded "
                                 "order each epoch.")
    anneal_from: float = option(
        1.0, "Lexicalized: deterministic annealing (Smith & Eisner 2004), the temperature T of "
             "each restart's first update. Each gradient step follows the posterior "
             "proportional to p(d)^beta over derivations (tree, heads and latent classes), "
             "beta = 1/T, flatter than the model's while beta < 1; beta rises linearly from "
             "1/anneal_from to 1 over the first train.anneal_epochs epochs. The loss and the "
             "logged likelihood of those epochs are (1/beta) log sum_d p(d)^beta. 1 is off.",
        range="[1, inf)")
    anneal_epochs: int = option(0, "... over this many epochs (0: no annealing).",
                                range="[0, inf)")


@dataclass
class PriorConfig:
    concentration: float = option(
        1.0, "alpha of the symmetric Dirichlet prior on every rule distribution. map_em: "
             "the MAP estimate, p ~ count + alpha - 1 (alpha >= 1; alpha = 1 is maximum "
             "likelihood); online_em applies the same M-step to its running counts. vb: the prior of mean-field VB; alpha < 1 favours sparse grammars.",
        range="(0, inf)")


@dataclass
class OnlineConfig:
    stepsize_power: float = option(0.7, "Stepwise EM step size (t + 2)^-power over minibatch "
                                        "updates t (Liang & Klein 2009 use 0.5 < power <= 1).",
                                   range="(0.5, 1]")


@dataclass
class OptimizerConfig:
    lr: float = option(0.01, "Peak learning rate of Adam.", range="(0, inf)")
    # beta1 0.75 and clipping at 3 are the published setting of Kim, Dyer & Rush 2019,
    # "Compound Probabilistic Context-Free Grammars for Grammar Induction" (from memory).
    beta1: float = option(0.75, "Adam beta1. 0.75 is the published setting of Kim, Dyer & "
                                "Rush 2019 (from memory).", range="[0, 1)")
    beta2: float = option(0.999, "Adam beta2.", range="[0, 1)")
    grad_clip: float | None = option(3.0, "Largest gradient norm (rescaled above it); null "
                                          "turns clipping off. 3 is the published setting of "
                                          "Kim, Dyer & Rush 2019 (from memory).",
                                     range="(0, inf)")
    warmup_steps: int = option(0, "Steps of linear warm-up from 0 to lr.", range="[0, inf)")
    schedule: Literal["constant", "cosine", "linear"] = option(
        "constant", "Decay after warm-up down to min_lr_ratio * lr at the last step.")
    min_lr_ratio: float = option(0.1, "Final learning rate as a fraction of lr.",
                                 range="[0, 1]")


# The largest NT x S^2 an independent-productions grammar file goes through the dense `Grammar`
# for (binary rules as an (NT, S, S) tensor, 2 GiB per float64 copy at this size). A larger
# grammar's file is written from each nonterminal's kept rules alone (`train.finish`), so its
# output.max_saved_rules may be at most this; a run that could not write its grammar would fail
# only after training.
INDEPENDENT_MAX_DENSE_RULES = 2 ** 28
INDEPENDENT_FORMS = ("independent", "independent-neural")  # the independent productions


@dataclass
class ConstraintsConfig:
    train_brackets: bool = option(
        False, "Use the brackets of the training trees as partial constraints: no tree may "
               "cross them (Pereira & Schabes 1992). Needs a bracketed or CoNLL-U corpus; a "
               "flat node leaves its inside unconstrained. A bracket that cuts a bound piece "
               "from its host (constraints.word_pieces) is left out while that constraint "
               "applies, and the log counts them.")
    brackets_from: Path | None = option(
        None, "A run folder or grammar file trained on the same corpus with the same data "
              "options (for example a run of configs/induce.yaml): its trees of the training "
              "sentences become partial brackets, as constraints.train_brackets makes of gold "
              "trees (Pereira & Schabes 1992). The trees are the consensus of the run's "
              "restarts when it saved two or more, else the mbr trees, decoded under the "
              "word-piece constraint when that run held it to its end (a bracket that still "
              "cuts a bound piece is left out while this run applies the constraint). Staged "
              "induction: the first model finds the constituents; this one learns what they "
              "leave open, such as the head of each constituent in a lexicalized model.")
    brackets_agreement: float | None = option(
        None, "With constraints.brackets_from naming a run that saved two or more restarts: "
              "keep only the brackets that at least this fraction of the restarts' mbr trees "
              "share (above 1/2, so that no two cross), instead of every bracket of their "
              "consensus tree; where the restarts disagree, this run chooses the tree. null: "
              "the consensus tree's brackets.", range="(0.5, 1]")
    brackets_epochs: int | None = option(
        None, "Apply the brackets (constraints.train_brackets or constraints.brackets_from) "
              "for this many epochs of each restart, then train without them. null: the "
              "whole run.", range="[1, inf)")
    word_pieces: Literal["auto", "host-first", "host-last", "none"] = option(
        "auto", "Written words that the tokenizer split into pieces (CoNLL-U multiword tokens, "
                "SpaceAfter=No): no constituent may take a bound piece without its host. auto "
                "reads from the training text which end of a written word holds the host "
                "(treewright.word_pieces) and leaves text that marks no splits (one sentence a "
                "line) unconstrained; host-first and host-last say it; none turns it off. Not "
                "applied with data.stream_chunk, which never holds the whole corpus.")
    word_pieces_epochs: int | None = option(
        None, "Apply the word-piece constraint for this many epochs of each restart, then "
              "train without it. null: the whole run when training reads words, the first "
              f"{TAG_MODE_PIECE_EPOCHS} epochs when it reads tags (data.tag_mode), where a "
              "constraint held longer drew every restart to left-branching trees on Turkish "
              "tags (a mask rewards the trees it always allows, and a few tags have nothing "
              "to pull against it; docs/induction_notes.md).", range="[1, inf)")


@dataclass
class BiasConfig:
    right_edge: float = option(
        0.0, "Structural bias (after Smith & Eisner 2006): log-weight added during training to "
             "every span that ends at a sentence's last word without starting at its first. "
             "Negative values steer the search away from right-branching trees, as fits a "
             "head-final language; 0 is no bias.")
    left_edge: float = option(
        0.0, "The mirror image: log-weight of every span that starts at a sentence's first "
             "word without ending at its last (negative for head-initial languages).")
    head_list: str | None = option(
        None, "Lexicalized: words whose dependents weigh more or less in training. For every "
              "dependent a listed word takes (every constituent of two or more words it "
              "heads) its log-weight is added: negative keeps it from heading (function "
              "words, which Universal Dependencies attaches to the content word of their "
              "phrase), positive draws dependents to it. A text file, one word per line, "
              "optionally followed by its own log-weight (blank lines and lines starting with "
              "# are skipped; words read as the training text is, data.lowercase), or "
              "'ud-function' for the function-word tags of Universal Dependencies (ADP, AUX, "
              "CCONJ, DET, PART, SCONJ, PUNCT, and the older universal tagset's CONJ, PRT and "
              "'.'), when data.tag_mode reads those tags. bias.anneal_epochs fades it out as it "
              "fades the edge bias. null: no list.")
    head_weight: float = option(
        0.0, "The log-weight of the words of bias.head_list that give none of their own.")
    arc_length: float = option(
        0.0, "Lexicalized: log-weight added during training for every word that lies between "
             "a dependent and its head, summed over a tree's dependencies (the locality bias of "
             "Smith & Eisner 2006). Negative favours short dependencies, on either side alike; "
             "neighbouring words cost nothing. bias.anneal_epochs fades it out as it fades the "
             "edge bias. 0 is no bias.")
    anneal_epochs: int = option(
        0, "Scale the bias linearly from full strength at epoch 0 down to zero at this epoch, "
           "so that the end of training is unbiased; 0 keeps it for the whole run.",
        range="[0, inf)")


@dataclass
class CurriculumConfig:
    start_length: int | None = option(None, "Train first on sentences of at most this many "
                                            "words; null trains on all lengths at once.",
                                      range="[1, inf)")
    increment: int = option(5, "Raise the length cap by this much ...", range="[1, inf)")
    every_epochs: int = option(1, "... every this many epochs.", range="[1, inf)")


@dataclass
class OutputConfig:
    run_dir: Path | None = option(None, "Run folder; null uses runs/<config file name>.")
    checkpoint_every_steps: int | None = option(
        None, "Online EM and gradient: also checkpoint every this many steps (always at "
              "the end of an epoch).", range="[1, inf)")
    log_every_steps: int = option(10, "Online EM and gradient: log step metrics this often.",
                                  range="[1, inf)")
    tensorboard: bool = option(True, "Write TensorBoard event files.")
    progress: bool = option(True, "Show progress with ETA on standard error: a bar on a "
                                  "terminal, plain lines otherwise.")
    stdout_metrics: bool = option(True, "Print each epoch's metrics on standard output.")
    max_saved_rules: int | None = option(
        5_000_000, "A grammar with more binary rules than this (NT x S^2, as low-rank models "
                   "with hundreds of symbols have) is saved with only each nonterminal's "
                   "max_saved_rules / NT most probable binary rules, renormalised; train.log "
                   "reports the probability mass left out. The checkpoint keeps the full "
                   "model. null: always save every rule.", range="[1, inf)")


@dataclass
class DistributedConfig:
    timeout_seconds: float = option(
        60.0, "Several workers: a worker whose heartbeat (one a second) has stopped this long "
              "ends the job with an error naming its rank.", range="(0, inf)")
    collective_timeout_seconds: float = option(
        1800.0, "Several workers: the longest wait at one all-reduce; must exceed the slowest "
                "worker's E-step of one update (an EM epoch's share).", range="(0, inf)")


@dataclass
class TrainConfig:
    data: DataConfig = option(doc="Corpora and vocabulary.")
    model: ModelConfig = option(ModelConfig(), "Grammar size and parameterization.")
    train: MethodConfig = option(MethodConfig(), "Learning method and schedule.")
    prior: PriorConfig = option(PriorConfig(), "Dirichlet prior (map_em, vb).")
    online: OnlineConfig = option(OnlineConfig(), "Stepwise EM.")
    optimizer: OptimizerConfig = option(OptimizerConfig(), "Adam (gradient method).")
    constraints: ConstraintsConfig = option(ConstraintsConfig(), "Partial brackets.")
    curriculum: CurriculumConfig = option(CurriculumConfig(), "Sentence-length curriculum.")
    bias: BiasConfig = option(BiasConfig(), "Structural bias on spans at the sentence edges.")
    output: OutputConfig = option(OutputConfig(), "Run folder and logging.")
    distributed: DistributedConfig = option(DistributedConfig(), "Data-parallel workers "
                                            "(train --workers N, or torchrun).")


def check_combinations(cfg: TrainConfig, source: str | None = None) -> None:
    """Rules that tie options together, all reported at once (ConfigError)."""
    problems = []

    def bad(key: str, message: str) -> None:
        problems.append(ConfigProblem(key, message, source))

    method = cfg.train.method
    form = cfg.model.parameterization
    if form == "independent" and method in ("online_em", "vb"):
        bad("train.method", f"independent productions train with 'gradient', 'em' or "
                            f"'map_em', not {method!r} (its statistics are kept as dense "
                            f"rule tables, NT x S^2, which independent productions exist to "
                            f"avoid)")
    elif form not in ("tabular", "independent") and method != "gradient":
        bad("train.method", f"the {form} parameterization trains only with 'gradient', not "
                            f"{method!r}")
    if cfg.model.parameterization != "tabular" and cfg.model.warm_start is not None:
        bad("model.warm_start", "a warm start sets tabular parameters; use "
                                "model.parameterization=tabular")
    nt, t = cfg.model.nonterminals, cfg.model.preterminals
    saved = cfg.output.max_saved_rules
    if cfg.model.parameterization in INDEPENDENT_FORMS \
            and nt * (nt + t) ** 2 > INDEPENDENT_MAX_DENSE_RULES \
            and (saved is None or saved > INDEPENDENT_MAX_DENSE_RULES):
        bad("output.max_saved_rules",
            f"an independent-productions grammar with {nt:,} nonterminals and {t:,} "
            f"preterminals has {nt * (nt + t) ** 2:,} binary rules; its grammar files can hold "
            f"each nonterminal's most probable ones, at most {INDEPENDENT_MAX_DENSE_RULES:,} "
            f"in all, not {'every one' if saved is None else f'{saved:,}'} (the checkpoint "
            "keeps the full model)")
    if cfg.model.parameterization == "lexicalized" and cfg.train.memory_budget_mb is not None:
        bad("train.memory_budget_mb", "the memory estimate does not cover the lexicalized "
                                      "inside pass (it grows as n^4); leave the budget null "
                                      "and cap data.max_length instead")
    if cfg.train.anneal_epochs > 0 and cfg.train.anneal_from > 1 \
            and cfg.model.parameterization != "lexicalized":
        bad("train.anneal_from", "deterministic annealing is implemented for "
                                 "model.parameterization=lexicalized only")
    b = cfg.bias
    if b.head_list is not None and cfg.model.parameterization != "lexicalized":
        bad("bias.head_list", "the head-word bias acts on heads, which only "
                              "model.parameterization=lexicalized has")
    if b.arc_length != 0 and cfg.model.parameterization != "lexicalized":
        bad("bias.arc_length", "the arc-length bias acts on dependencies, which only "
                               "model.parameterization=lexicalized has")
    if b.head_weight != 0 and b.head_list is None:
        bad("bias.head_weight", "bias.head_weight weighs the words of bias.head_list: a file "
                                "of words, or 'ud-function' for the function tags of "
                                "Universal Dependencies")
    if b.head_list == UD_FUNCTION and b.head_weight == 0:
        bad("bias.head_weight", f"'{UD_FUNCTION}' gives its tags no weight of their own; set "
                                f"bias.head_weight (negative keeps them from heading)")
    if b.head_list == UD_FUNCTION and not cfg.data.tag_mode:
        bad("bias.head_list", f"'{UD_FUNCTION}' names tags; it needs data.tag_mode=true (for "
                              f"words, give a file of words)")
    if cfg.train.anneal_epochs > cfg.train.epochs:
        bad("train.anneal_epochs", f"annealing over {cfg.train.anneal_epochs} epochs would not "
                                   f"reach beta = 1 within train.epochs={cfg.train.epochs}, "
                                   f"so the model would never train on its own likelihood")
    if method == "em" and cfg.prior.concentration != 1:
        bad("prior.concentration", "plain em is maximum likelihood (alpha = 1); use "
                                   "train.method=map_em or vb for a Dirichlet prior")
    if method == "gradient" and cfg.prior.concentration != 1:
        bad("prior.concentration", "gradient training has no prior; leave alpha at 1")
    if method in ("map_em", "online_em") and cfg.prior.concentration < 1:
        bad("prior.concentration", f"{method} needs alpha >= 1 (the Dirichlet mode exists only "
                                   f"then); got {cfg.prior.concentration}; use vb for "
                                   f"sparse priors")
    if cfg.model.warm_start is not None and cfg.train.restarts > 1 and cfg.model.warm_start_mix \
            == 0:
        bad("train.restarts", "restarts from the same warm start with no mixing are identical")
    if cfg.data.stream_chunk is not None and method != "online_em":
        bad("data.stream_chunk", f"streaming reads the corpus chunk by chunk for online_em "
                                 f"minibatches; {method!r} needs the whole corpus at once")
    if cfg.data.stream_chunk is not None and cfg.constraints.train_brackets:
        bad("constraints.train_brackets", "partial brackets need the whole corpus in memory; "
                                          "leave data.stream_chunk null")
    c = cfg.constraints
    if c.train_brackets and c.brackets_from is not None:
        bad("constraints.brackets_from", "brackets come from the training trees "
                                         "(constraints.train_brackets) or from a grammar's "
                                         "trees, not both")
    if cfg.data.stream_chunk is not None and c.brackets_from is not None:
        bad("constraints.brackets_from", "partial brackets need the whole corpus in memory; "
                                         "leave data.stream_chunk null")
    if c.brackets_agreement is not None and c.brackets_from is None:
        bad("constraints.brackets_agreement", "there is no bracket source to agree: set "
                                              "constraints.brackets_from to a run with "
                                              "restarts")
    if c.brackets_epochs is not None and not c.train_brackets and c.brackets_from is None:
        bad("constraints.brackets_epochs", "there are no brackets to apply: set "
                                           "constraints.train_brackets or "
                                           "constraints.brackets_from")
    if cfg.data.stream_chunk is not None and cfg.constraints.word_pieces.startswith("host"):
        bad("constraints.word_pieces", "the word-piece constraint needs the whole corpus in "
                                       "memory; leave data.stream_chunk null or set it to auto")
    if problems:
        raise ConfigError(problems, path=source)


def load_train_config(path: str | Path | None, overrides: Sequence[str] = ()) -> TrainConfig:
    """The checked config from defaults, the YAML file and overrides (ConfigError lists every
    problem)."""
    cfg = load_config(TrainConfig, path, overrides, resolve_paths=True)
    check_combinations(cfg, None if path is None else str(path))
    return cfg


def train_config_from_dict(data: dict, source: str) -> TrainConfig:
    cfg = config_from_dict(TrainConfig, data, source)
    check_combinations(cfg, source)
    return cfg
