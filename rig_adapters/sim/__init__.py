"""The simulated rig: invented animals and cells, the rig process, a stimulator stand-in and the demo."""
