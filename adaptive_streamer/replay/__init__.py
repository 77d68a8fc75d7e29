"""rosbag2 recording and reading (rosbags), offline replay and reports."""
