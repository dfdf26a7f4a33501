"""What every part of gradprobe shares: errors, the status vocabulary, workspaces of arrays, wording, guards."""
