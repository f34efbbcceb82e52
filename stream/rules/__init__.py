"""Rules read off a tree, as text for people, JSON for machines and Markdown for tickets.

==========  ==============================================================================
rule        ``Rule``; ids, display order, the JSON form
classify    ``extract_rules``: one rule per leaf of a classification tree
regress     ``extract_regression_rules``: consequents with a value and spread, or a
            short linear formula
text        ``render_text``: aligned text, fixed decimals, stable order
regions     a rule's conditions as a region of the input space
simplify    shorter rules that decide exactly as the tree does
diff        what changed between two rule sets
markdown    rules and rule changes as Markdown
==========  ==============================================================================
"""

from stream.lazy import lazy_face

__getattr__, __all__ = lazy_face(__name__, {
    "Rule": "rule", "Condition": "rule", "rules_payload": "rule",
    "rules_from_payload": "rule", "extract_rules": "classify",
    "extract_regression_rules": "regress", "render_text": "text"})
