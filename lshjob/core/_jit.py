"""numba, as lshjob's kernel modules import it: the first of them to load registers the
one-line notice printed when a kernel compiles (:func:`lshjob.core.compile_cache.install_notice`),
so ``import lshjob`` itself stays free of numba (the ``lshjob`` command takes over the stop
signals first) and the notice still comes before any compile, however the kernels are reached."""

import numba

from lshjob.core.compile_cache import install_notice

install_notice()

__all__ = ["numba"]
