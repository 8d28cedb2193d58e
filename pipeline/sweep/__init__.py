"""Running a sweep: the config, the run model that turns it into devices, disorder, gates and
ideal values, the checks before compute, the worker tasks, the driver, the sample store and the
local and Slurm clusters."""
