"""The parts of calibrated conversion (:mod:`orbify.calibration.calibrate`): running both models side by side
(:mod:`.paired`), the least-squares refit of one layer (:mod:`.equations`), the choice of kept
channels (:mod:`.selection`) and the report (:mod:`.report`)."""
