"""Calibrated conversion: :func:`orbify.calibration.calibrate.calibrate_conversion` refits a converted model.

Its parts: the layers refitted, in stages, and the channels they keep (:mod:`.targets`, choosing the
kept channels: :mod:`.selection` with :mod:`.span`), running both models side by side
(:mod:`.paired`), the least-squares refit of one layer (:mod:`.equations`, in base coordinates:
:mod:`.coordinates`), writing the new weights (:mod:`.layer_weights`) and norm parameters
(:mod:`.norms`), the agreement with the original (:mod:`.agreement`) and the report (:mod:`.report`).
"""
