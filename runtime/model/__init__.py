"""The network: the MLP's flat layout and workspaces, the loss and activation tables, the predictor."""
