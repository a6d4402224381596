"""The loop: the controller that folds the logbook, refits, proposes, submits and collects.
"""
