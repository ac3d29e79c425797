import torch

# Small tensors only: one intra-op thread is faster than many and keeps run times stable on shared CI cores.
torch.set_num_threads(1)
