"""``python -m lshjob``: the same as the ``lshjob`` command."""

from lshjob.cli.console import main

if __name__ == "__main__":
    main()
