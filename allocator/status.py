"""The status words of every result, in one place (see docs/results.md).

Every result has ``status`` (one word from this module), ``success`` (bool) and
``message`` (one line for people). There are two kinds of word:

*Outcome of a solve* -- did the computation produce a verified answer?

=============  ==========================================================================
word           meaning
=============  ==========================================================================
``optimal``    solved, and the answer re-checked against every requirement
``infeasible`` no tolerances within their limits meet a requirement; ``message`` says
               which and by how much (a property of the case, not a failure of the tool)
``failed``     the solvers gave no verified answer (a numerical failure)
``partial``    a sweep in which some values cannot be met by some model (those points
               are ``infeasible``; the others ``optimal``)
``boundary``   a fallout-target optimum at the edge of what can be searched (the
               tightest target the tolerances can meet, a search bound, or every
               tolerance at its loosest): optimal within the search, no interior minimum
=============  ==========================================================================

A study of many cases (:mod:`allocator.studies`) adds one word for a case it could not
take: ``bad input`` (the case file, or a model asked of it, is wrong; its row carries the
one-line error and the study goes on).

*Verdict on a design* -- does a given set of tolerances meet its targets? A verdict is
not the outcome of a solve (a design can fail its target in a perfectly good run), so it
has its own words:

=============  ==========================================================================
``pass``       the simulated fallout does not exceed the target beyond the confidence
               interval
``fail``       it does (``ci_low_ppm > target_ppm``)
=============  ==========================================================================

Which result uses which words:

========================  ================================================  ================
result                    status words                                      success when
========================  ================================================  ================
Allocation                optimal, infeasible, failed                       optimal
Frontier                  optimal, partial, infeasible, failed              optimal, partial
Frontier point            optimal, infeasible, failed                       --
FalloutEconomics          optimal, infeasible, failed                       optimal
FalloutOptimum            optimal, boundary, infeasible, failed             optimal, boundary
SupplierSheet             optimal, infeasible, failed (the base's)          optimal
Loosening (sheet row)     optimal, infeasible, failed (the re-solve's);     --
                          fixed, at loosest (no re-solve: nothing to try)
OfferEvaluation           optimal, partial, infeasible, failed              optimal, partial
OfferResult (offer row)   optimal, infeasible, failed                       --
Verification              pass, fail                                        pass
RequirementCheck          pass, fail                                        --
Report                    ok, infeasible, failed, verification failed       ok
Study, StudyRow           optimal, infeasible, failed, bad input            optimal
CostFits                  optimal, failed                                   optimal
CapabilityStudy           ok                                                ok
========================  ================================================  ================

Words a user reads on the command line, in ``--json`` output or in the HTML report
(``partial``, ``boundary``, ``pass``/``fail``, ``fixed``, ``at loosest``, and the
report's ``ok`` / ``verification failed``) are kept as they always were.
"""

from __future__ import annotations

__all__ = [
    "OPTIMAL", "INFEASIBLE", "FAILED", "PARTIAL", "BOUNDARY", "PASS", "FAIL",
    "FIXED", "AT_LOOSEST", "OK", "VERIFICATION_FAILED", "BAD_INPUT",
    "SOLVE", "SWEEP", "FALLOUT_OPTIMUM", "VERDICT", "LOOSENING", "REPORT", "STUDY", "FIT", "CAPABILITY",
    "ALL",
]

# outcome of a solve
OPTIMAL = "optimal"
INFEASIBLE = "infeasible"
FAILED = "failed"
PARTIAL = "partial"
BOUNDARY = "boundary"

# verdict on a design
PASS = "pass"
FAIL = "fail"

# a supplier-sheet row with nothing to re-solve
FIXED = "fixed"
AT_LOOSEST = "at loosest"

# the design-review report as a whole
OK = "ok"
VERIFICATION_FAILED = "verification failed"

# a case a study could not read or allocate as asked
BAD_INPUT = "bad input"

SOLVE = (OPTIMAL, INFEASIBLE, FAILED)
"""Allocation, a frontier point, FalloutEconomics, SupplierSheet."""
SWEEP = (OPTIMAL, PARTIAL, INFEASIBLE, FAILED)
"""Frontier."""
FALLOUT_OPTIMUM = (OPTIMAL, BOUNDARY, INFEASIBLE, FAILED)
"""FalloutOptimum."""
VERDICT = (PASS, FAIL)
"""Verification and RequirementCheck."""
LOOSENING = (*SOLVE, FIXED, AT_LOOSEST)
"""A supplier-sheet row."""
REPORT = (OK, INFEASIBLE, FAILED, VERIFICATION_FAILED)
"""The design-review report."""
STUDY = (*SOLVE, BAD_INPUT)
"""Study and its rows."""
FIT = (OPTIMAL, FAILED)
"""CostFits (cost curves fitted to quotes)."""
CAPABILITY = (OK,)
"""CapabilityStudy (capability from measured parts)."""
ALL = tuple(dict.fromkeys((*SWEEP, BOUNDARY, *VERDICT, FIXED, AT_LOOSEST, OK, VERIFICATION_FAILED, BAD_INPUT)))
"""Every status word, once."""
