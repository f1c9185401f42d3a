"""The live engine behind the widgets: explorer state, view parts, coalescing worker, contours."""
