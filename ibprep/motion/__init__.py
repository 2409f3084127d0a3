"""Prescribed motion of the bodies: rigid poses and velocities, waveforms and the flow numbers."""

__all__: list[str] = []
