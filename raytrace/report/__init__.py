"""What a person reads: figures, the one-page report and its trust lines.

In: sightline and sky results and their limits. Out: figures (``plots``), the
report (``page``: PNG, PDF and text), the lines on how far to trust a result
(``trust``) and warnings when inputs describe different run set-ups
(``crosscheck``).
"""
