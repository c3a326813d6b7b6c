"""The names the recurrent math understands; Config and the panel offer exactly these."""

TASKS = ("regression", "classification")
MODES = ("many-to-one", "many-to-many")
ACTIVATIONS = ("tanh", "sigmoid", "relu", "linear")  # order = index used as data
INITS = ("glorot", "orthogonal", "identity")
CELLS = ("elman", "gru", "lstm")  # Elman; GRU as torch.nn.GRU; LSTM with forget gate as torch.nn.LSTM
