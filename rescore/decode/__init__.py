"""Decoding an N-best list beyond its single best: posteriors, minimum-risk choice,
consensus over a word confusion network, word confidences, and merging several systems.

One concept per module: :mod:`~rescore.decode.posterior` (list posteriors and their scale),
:mod:`~rescore.decode.words` (words as characters, alignments), :mod:`~rescore.decode.risk`
(minimum expected word errors), :mod:`~rescore.decode.network` (confusion network and
consensus), :mod:`~rescore.decode.choice` (the rules behind ``--choose`` and the word
confidences of what they output), :mod:`~rescore.decode.confidence` (confidence measures
and calibration), :mod:`~rescore.decode.combine` (several recognizers' lists into one).

Below ``pipeline`` and ``tune`` in the import graph: these modules import only
:mod:`rescore.scoring` (``segment_argmax``), :mod:`rescore.text`, :mod:`rescore.nbest`,
:mod:`rescore.errors`, numpy and rapidfuzz.
"""
