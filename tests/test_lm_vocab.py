"""Words to ids: the vectorised look-up of clean blocks against the plain dict rule."""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from rescore.lm.vocab import UNK_ID, Vocabulary, encode, encode_block
from rescore.text import clean_words, normalise_block

# words of 1 to 12 characters (so both sides of the 8-byte packing, in bytes too: "é" is
# two), the reserved tokens, a NUL inside a word (whose zero-padded packing is ambiguous)
_word = st.one_of(
    st.text(alphabet=st.sampled_from(list("abz'-\u00e9\u03c3\x00\x01")), min_size=1,
            max_size=12),
    st.sampled_from(["<s>", "</s>", "<unk>", "a", "ab", "abcdefgh", "abcdefghi"]),
)


@settings(max_examples=300)
@given(st.lists(_word, max_size=30), st.lists(st.lists(_word, max_size=6), min_size=1,
                                             max_size=6))
def test_encode_block_equals_dict_look_up(vocab_words: list[str],
                                          lines: list[list[str]]) -> None:
    # the rule is encode(): vocab.index.get(word, <unk>) for each normalised word, and the
    # literal <s> / </s> are unknown words; encode_block must give the same ids, line counts
    vocab = Vocabulary.from_words(vocab_words)
    clean = normalise_block("\n".join(" ".join(line) for line in lines).encode("utf-8"))
    words = clean_words(clean)
    stream, oov = encode(vocab, words)
    ids, counts = encode_block(vocab, clean)
    assert counts.tolist() == [len(w) for w in words]
    body = stream.tokens[stream.tokens > 1]  # <s> and </s> are ids 0 and 1
    assert ids.tolist() == body.tolist()
    assert int((ids == UNK_ID).sum()) == oov


def test_encode_block_known_and_unknown_words() -> None:
    # hand-worked: ids 0-2 are <s> </s> <unk>, then the words in order given
    vocab = Vocabulary.from_words(["pump", "ventilation", "bay"])
    ids, counts = encode_block(vocab, normalise_block(b"Pump bay\n\nventilation <s> valve"))
    assert ids.tolist() == [3, 5, 4, UNK_ID, UNK_ID]
    assert counts.tolist() == [2, 0, 3]


@settings(max_examples=200)
@given(st.lists(st.lists(st.lists(_word, max_size=6), max_size=5), min_size=1, max_size=4))
def test_first_pass_of_blocks_counts_as_the_word_lists(blocks: list[list[list[str]]]) -> None:
    # the rule is first_pass over the sentences (non-blank lines' word lists): the same
    # words with the same counts, the same sentence lengths, and a body that names the
    # same word at every position (provisional ids may be numbered otherwise)
    from rescore.lm.vocab import first_pass, first_pass_blocks

    cleans = [normalise_block("\n".join(" ".join(line) for line in lines).encode("utf-8"))
              for lines in blocks]
    sentences = [s for c in cleans for s in clean_words(c) if s]
    words, counts, body, lengths = first_pass(sentences)
    b_words, b_counts, b_body, b_lengths = first_pass_blocks(cleans)
    assert dict(zip(b_words, b_counts.tolist(), strict=True)) == \
        dict(zip(words, counts.tolist(), strict=True))
    assert [b_words[i] for i in b_body] == [words[i] for i in body]
    assert b_lengths.tolist() == lengths.tolist()
