"""Taking part from a hospital's own server: keys, the outbound connection, the task runner."""
