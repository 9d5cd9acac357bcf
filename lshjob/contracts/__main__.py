"""``python -m lshjob.contracts``: print DEVELOPERS.md's section on the stage contracts."""

from lshjob.contracts.doc import markdown

print(markdown(), end="")
