"""Simulated flight controller on a simulated airframe (device side of the spinrig protocol).

Imports ``firmware_protocol`` only, never ``monitor``.
"""
