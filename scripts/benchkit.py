"""What every benchmark shares: the process settings of the command line, said aloud."""

from __future__ import annotations

from rescore.process import avoid_huge_pages, keep_freed_memory


def like_the_command_line() -> None:
    """Apply the command line's process settings here too, and print what they are."""
    changed = avoid_huge_pages()
    print("numpy huge-page advice: " + ("off, as in the command line" if changed
                                        else "as set by NUMPY_MADVISE_HUGEPAGE or numpy"))
    kept = keep_freed_memory()
    print("freed memory: " + ("kept for reuse, as in the command line" if kept
                              else "glibc's default or the user's MALLOC_* settings"))
