"""Spin tests the host runs: sweep plans (:mod:`.plan`), the controller that drives a device
through one with every stop path (:mod:`.controller`), and the ``sweep`` command (:mod:`.command`)."""
