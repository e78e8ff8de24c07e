"""Remote mode: a step's compute staged to a cluster over SSH, and the cluster-side runner."""
