"""What people look at: the customer report (``report``) and the step preview
sheet (``preview``), both built from files and results, never from memory of a run."""
