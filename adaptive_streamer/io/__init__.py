"""Message and file input/output of the nodes and tools (ROS messages, bags, files)."""
