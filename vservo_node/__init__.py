"""vservo_node."""
