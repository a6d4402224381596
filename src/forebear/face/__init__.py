"""What people and programs touch: the command line (parsing and printing only), the progress display, the report, the demo.
"""
