"""Corpora: raw text, bracketed trees and CoNLL-U read into one `Sentence` type, tree
transforms with exact inverses, and seeded splits and length-bucketed batches.

Entry points: `read_corpus` (whole file) and `CorpusStream` (chunks of a file larger than memory),
both taking `ReadOptions`; `Corpus.report` (a `ReadReport`) says what was used and what was not.
"""

from treewright.corpus.batching import Split, cubic_cost, length_batches, split_indices
from treewright.corpus.brackets import (BracketRecord, clean_tree, iter_bracket_records,
                                        parse_brackets, preterminal_tags, strip_label)
from treewright.corpus.dependencies import (DependencySentence, check_tree, dependency_to_tree,
                                            iter_conllu_blocks, lift_to_projective,
                                            nonprojective_arcs, subtree_spans)
from treewright.corpus.lines import iter_lines, iter_word_list
from treewright.corpus.reader import (FORMATS, CorpusStream, detect_format, joined_without,
                                      read_corpus, read_records, read_tagged, write_skip_log)
from treewright.corpus.transforms import (BIN_MARK, PARENT_SEP, UNARY_SEP, binarize,
                                          collapse_unary, expand_unary, has_transform_marks,
                                          insert_words,
                                          treebank_form, unbinarize)
from treewright.corpus.types import (CASE_RULES, PTB_PUNCT_LABELS, REASONS, UD_FUNCTION,
                                     UD_FUNCTION_TAGS, Corpus, ReadOptions,
                                     ReadReport, Sentence, SkippedRecord, lowercase,
                                     normalization_note, normalization_variants,
                                     run_case_rules, run_drop_tags, run_read_options,
                                     run_tag_mode)
from treewright.corpus.walk import depth, trees_equal

__all__ = [
    "BIN_MARK", "BracketRecord", "CASE_RULES", "Corpus", "CorpusStream", "DependencySentence",
    "FORMATS", "PARENT_SEP", "PTB_PUNCT_LABELS", "REASONS", "ReadOptions", "ReadReport",
    "UD_FUNCTION", "UD_FUNCTION_TAGS",
    "Sentence", "SkippedRecord", "Split", "UNARY_SEP", "binarize", "check_tree", "clean_tree",
    "collapse_unary", "cubic_cost", "dependency_to_tree", "depth", "detect_format", "expand_unary", "has_transform_marks",
    "insert_words", "iter_bracket_records", "iter_conllu_blocks", "iter_lines", "iter_word_list",
    "joined_without",
    "length_batches",
    "lift_to_projective", "lowercase", "nonprojective_arcs", "normalization_note",
    "normalization_variants", "parse_brackets", "preterminal_tags",
    "read_corpus", "read_records", "read_tagged", "run_case_rules", "run_drop_tags",
    "run_read_options", "run_tag_mode", "split_indices", "strip_label", "subtree_spans",
    "treebank_form", "trees_equal", "unbinarize", "write_skip_log",
]
