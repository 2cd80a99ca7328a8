"""Decoding an N-best list beyond its single best: posteriors, minimum-risk choice,
consensus over a word confusion network, word confidences, and merging several systems.

One concept per module: :mod:`~rescore.decode.posterior` (list posteriors and their scale),
:mod:`~rescore.decode.words` (words as characters, alignments), :mod:`~rescore.decode.risk`
(minimum expected word errors), :mod:`~rescore.decode.network` (confusion network and
consensus), :mod:`~rescore.decode.confidence` (confidence measures and calibration),
:mod:`~rescore.decode.combine` (several recognizers' lists into one).
"""
