"""The imperative shell: the command line, the HTTP service, storage and jobs.

Importing it sets one process-wide default before numpy is loaded: numpy asks the kernel for
transparent huge pages for every array of 4 MB or more (madvise), and on a machine where a fresh
huge page is slow to get (the project's two-core VM: 3.3 to 5.3 s to fill 480 MB in huge pages,
0.25 s in small ones; freed 2 MB blocks seem to go back to the host) that advice costs more than
it saves: a 1,000,000 x 60 report took 25.0 / 26.3 s with it, 19.8 / 20.6 s without
(docs/performance.md). Unless the
environment already chose (``NUMPY_MADVISE_HUGEPAGE=1`` asks for huge pages), the command line,
the service and the processes they start tell numpy not to ask. numpy reads the variable when it
is first imported, so a program that loaded numpy before this package keeps numpy's default;
the measurement core (``import samesource``) sets nothing.
"""

import os

os.environ.setdefault("NUMPY_MADVISE_HUGEPAGE", "0")
