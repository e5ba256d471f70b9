"""Learning: training configs, backbones, patch data, the network and the training loop."""
