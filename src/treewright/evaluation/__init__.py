"""Evaluation of induced grammars: brackets, heads, tags and held-out likelihood.

Works on `treewright.trees.Tree` objects and plain span sets (`Bracketing`); it reads no files and
knows nothing of training. Modules:
- `spans`: `Bracketing`, and the reference trees (left/right-branching, random, binary upper bound).
- `brackets`: `evaluate_brackets`, unlabeled/labeled F1 beside the baselines, all conventions stated.
- `dependencies`: `evaluate_attachment`, directed/undirected/NED attachment accuracy of predicted
  heads beside the left-chain and right-chain baselines, all conventions stated.
- `tags`: `evaluate_tags`, many-to-one accuracy and V-measure of induced preterminals.
- `likelihood`: `heldout_likelihood`, log-likelihood per word and perplexity.
- `segmentation`: `evaluate_segmentation`, boundary and token precision, recall and F1 of a
  segmentation of unsegmented text against the gold one.
"""

from treewright.evaluation.brackets import (DEFAULT_PUNCTUATION_TAGS, DEFAULT_PUNCTUATION_TOKENS,
                                            BracketConventions, BracketEvaluation, BracketScores,
                                            LabelRecall, LengthBucket, evaluate_brackets)
from treewright.evaluation.dependencies import (AttachmentScores, Dependencies,
                                                DependencyEvaluation, evaluate_attachment,
                                                left_chain, right_chain)
from treewright.evaluation.likelihood import (LikelihoodScores, heldout_likelihood,
                                              perplexity)
from treewright.evaluation.segmentation import (PRF, SegmentationScores,
                                                evaluate_segmentation)
from treewright.evaluation.spans import (Bracketing, binary_upper_bound, left_branching, left_branching_tree,
                                         random_binary, right_branching, right_branching_tree, spans_to_tree)
from treewright.evaluation.tags import (TagScores, evaluate_tags, preterminal_labels,
                                        words_over_tags)

__all__ = [
    "Bracketing", "left_branching", "right_branching", "random_binary", "binary_upper_bound",
    "spans_to_tree", "left_branching_tree", "right_branching_tree",
    "BracketConventions", "BracketEvaluation", "BracketScores", "LabelRecall", "LengthBucket",
    "evaluate_brackets", "DEFAULT_PUNCTUATION_TAGS", "DEFAULT_PUNCTUATION_TOKENS",
    "AttachmentScores", "Dependencies", "DependencyEvaluation", "evaluate_attachment",
    "left_chain", "right_chain",
    "TagScores", "evaluate_tags", "preterminal_labels", "words_over_tags",
    "LikelihoodScores", "heldout_likelihood", "perplexity",
    "PRF", "SegmentationScores", "evaluate_segmentation",
]
