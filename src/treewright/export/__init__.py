"""Export, inspection and reuse of learned grammars.

Formats: the grammar text format (`Grammar.save`), the JSON export (`jsonformat`, with its
documentation), a readable listing (`listing`), parsed corpora as bracketed trees or CoNLL-U
columns (`parses`), and CoNLL-U with HEAD filled from predicted heads (`heads`). Also pruning
(`prune`), renaming symbols (`rename`) and comparing
two grammars (`compare`). A grammar is read from a text file, a JSON export or a training run
folder by `load`.

Notebook use (this exact code is run by tests/test_export_api.py):

    from treewright.export import load, iter_rules
    from treewright.inference import score, viterbi_parse

    grammar = load("src/treewright/data/examples/astronomers.pcfg")      # a grammar file, a JSON export or a run folder
    sentences = [line.split() for line in ["astronomers saw stars with ears",
                                           "astronomers saw ears"]]
    for result in score(grammar, sentences):
        print(result.logprob, result.parsed)         # natural log of the sentence probability
    for tree, logprob in viterbi_parse(grammar, sentences):
        print(tree.to_string(), logprob)             # the most probable tree
    for rule in iter_rules(grammar):
        if rule.kind == "binary" and rule.prob < 1.0:
            print(rule.lhs, "->", *rule.rhs, rule.prob)
"""

from treewright.export.compare import Comparison, SymbolMatch, compare
from treewright.export.heads import fill_heads_conllu, heads_to_conllu
from treewright.export.jsonformat import (FORMAT_VERSION, GrammarExport, grammar_json_text,
                                          grammar_to_json, load_grammar_export,
                                          load_grammar_json, save_grammar_json)
from treewright.export.listing import (ExpectedCounts, SpanExample, SymbolSummary,
                                       expected_counts, format_listing, summarize,
                                       symbol_examples)
from treewright.export.parses import (HeadRule, ParsedSentence, dependency_heads,
                                      fill_parsed_conllu, head_rule, parse_corpus, to_brackets,
                                      to_conllu)
from treewright.export.prune import PruneReport, prune
from treewright.export.rename import load_renaming, rename_grammar, rename_tree
from treewright.export.source import (GrammarSource, Rule, iter_rules, load, open_grammar,
                                      open_restart_grammars, open_run_record, saved_restarts)

__all__ = [
    "Comparison", "ExpectedCounts", "FORMAT_VERSION", "GrammarExport", "GrammarSource",
    "ParsedSentence", "PruneReport", "Rule", "SpanExample", "SymbolMatch", "SymbolSummary",
    "compare", "expected_counts", "format_listing", "grammar_json_text", "grammar_to_json", "iter_rules", "load",
    "load_grammar_export", "load_grammar_json", "load_renaming", "open_grammar",
    "open_restart_grammars", "open_run_record", "saved_restarts",
    "parse_corpus", "prune", "rename_grammar", "rename_tree", "save_grammar_json",
    "summarize", "symbol_examples", "to_brackets", "to_conllu", "fill_parsed_conllu",
    "HeadRule", "dependency_heads", "head_rule", "fill_heads_conllu", "heads_to_conllu",
]
