"""Operating-point analysis: the sampled loop of plant, load and controller linearised at one
operating point (closed-loop poles, loop gain and its margins, output impedance against the
load's input impedance), and the same over a grid of operating points (the stability map).

``linear.py`` builds the linear model from the plugins' compiled kernels; ``point.py`` turns it
into the figures of one operating point; ``grid.py`` runs the map in parallel; ``plots.py``
draws them.
"""
