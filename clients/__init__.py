"""twistrate.clients: programs that talk to the service only over the documented wire protocol."""
