"""Several processes: torchrun / DDP, FSDP2 sharding, devices and process-group backends."""
