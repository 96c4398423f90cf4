"""The dock-rover demo (docs/architecture.md §8): a rover learns to reach its charging
dock from a simulated trainer's approval, through a real tickmarkd.

Modules: world (the floor and the rover), trainer (the simulated trainer
program), learner (the demo agent program), progress (its progress line),
plot (the summary figure).
Invented scenario and parameters; for demonstration only.
"""
