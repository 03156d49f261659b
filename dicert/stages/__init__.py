"""The stages of the certify and verify recipes, in the order certify runs them.

1. read and scan (:mod:`~dicert.stages.scan`): one streaming pass over the log: counts,
   digest, harvested raw bits, early stopping and following for probability estimation;
2. design checks and 3. analysis (:mod:`~dicert.stages.analysis`): design conformance, input
   identity, seed sanity, then the finite-size decision from the counts, and after extraction
   the output screens;
4. extraction: :func:`dicert.extract.extract_toeplitz` (called by
   :func:`dicert.certification.extract_stage`);
5. sealing (:mod:`~dicert.stages.record`): the record body, then signing
   (:func:`dicert.audit.record.seal_record`);
6. chaining (:mod:`~dicert.stages.chaining`): extending a beacon chain, the commit point.

:func:`dicert.certification.certify` runs them forward; :func:`dicert.verification.verify`
runs scan, analysis and sealing again from the recorded inputs and compares. Each stage is a
function of its inputs, testable alone; only scanning reads files and only the recipe's
output stage (:mod:`dicert._outputs`) writes them.
"""
