"""Reading a recorded session back and rendering it: text, HTML, SVG plots, the printed frame,
exports and the history of a beam. Formatting only: every number comes from the one evaluation.
"""
