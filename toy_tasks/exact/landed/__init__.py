"""The exact solvers as they stood before the fast ones (commit 23b7cfa), kept unchanged as the
independent route that tests and ``bench/exact_solve.py`` hold the fast solvers to: scipy's trust-region
Newton with derivatives by torch autograd per call (:mod:`toy_tasks.exact.landed.margin`,
:mod:`toy_tasks.exact.landed.pairs`). Nothing outside tests and bench/ imports them."""
