"""pyserial URL handlers of spinrig's simulators (``sim://``); see :func:`simulators.register`."""
