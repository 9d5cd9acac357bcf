"""``python -m lshjob.contracts``: print DEVELOPERS.md's section on the stage contracts."""

from lshjob.contracts.doc import markdown

if __name__ == "__main__":  # not when a tool imports every module of the package
    print(markdown(), end="")
