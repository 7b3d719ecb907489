"""The daemon on the network: the wire schema, spectrum messages, the publisher, the control socket, CURVE keys, collect."""
