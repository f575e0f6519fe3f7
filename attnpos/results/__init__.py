"""Every stage's result, as data: the classes of the result protocol (:mod:`attnpos.core.protocol`).

They hold what a stage measured and turn it into JSON, files, tables and notebook displays; none of them runs a
model or imports torch, so a saved result opens anywhere. :func:`attnpos.core.protocol.load` reads any result file.

=============  ==========================================  =====================================
kind           class                                       made by
=============  ==========================================  =====================================
``scan``       :class:`~attnpos.results.scan.Scan`          :func:`attnpos.scan`
``split``      :class:`~attnpos.results.split.SplitResult`  :meth:`attnpos.split.Split.fit`
``shift``      :class:`~attnpos.results.shift.ShiftResult`  :meth:`attnpos.shift.ShiftTest.run`
``induction``  :class:`~attnpos.results.induction.InductionResult`  :func:`attnpos.induction.induction_scores`
``probe``      :class:`~attnpos.results.probe.ProbeResult`  :func:`attnpos.probes.probe`
``length``     :class:`~attnpos.results.length.LengthResult`  :func:`attnpos.length.length`
``bands``      :class:`~attnpos.results.bands.BandsResult`  :func:`attnpos.bands.rope_bands`
``ablation``   :class:`~attnpos.results.ablation.AblationResult`  :func:`attnpos.ablate`
``compare``    :class:`~attnpos.results.compare.CompareResult`  :func:`attnpos.compare.compare`
``stretch``    :class:`~attnpos.results.stretch.StretchResult`  :func:`attnpos.stretching.stretch`
``sweep``      :class:`~attnpos.results.sweep.SweepResult`  :func:`attnpos.sweeping.sweep`
=============  ==========================================  =====================================
"""
