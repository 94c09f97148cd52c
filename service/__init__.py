"""The imperative shell: the command line, the HTTP service, storage and jobs.

Importing it sets one process-wide default before numpy is loaded: numpy asks the kernel for
transparent huge pages for every array of 4 MB or more (madvise), and on a machine where none
can be had (the project's two-core VM: its AnonHugePages stays 0) every page fault of such an
array then costs about 20 times as much: 480 MB took 5.3 s to fill instead of 0.25 s, and a
1,000,000 x 60 report 25.0 / 26.3 s instead of 19.8 / 20.6 s (docs/performance.md). Unless the
environment already chose (``NUMPY_MADVISE_HUGEPAGE=1`` asks for huge pages), the command line,
the service and the processes they start tell numpy not to ask. numpy reads the variable when it
is first imported, so a program that loaded numpy before this package keeps numpy's default;
the measurement core (``import samesource``) sets nothing.
"""

import os

os.environ.setdefault("NUMPY_MADVISE_HUGEPAGE", "0")
