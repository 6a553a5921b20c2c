"""Scale-out: a shard publishes its state snapshots; a merger pools them."""
