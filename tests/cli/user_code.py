"""The source of a user's own model file, shared by the terminal tests that write it into their work folder: a
three-layer MLP over 20 features (invented for tests). Each test appends the build functions it needs."""

NET = """
import torch
from torch import nn

class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.fc1 = nn.Linear(20, 48)
        self.fc2 = nn.Linear(48, 48)
        self.head = nn.Linear(48, 5)

    def forward(self, x):
        return self.head(torch.relu(self.fc2(torch.relu(self.fc1(x)))))
"""
