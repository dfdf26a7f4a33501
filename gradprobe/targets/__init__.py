"""Loading targets and their forms: entry points, functions, stacks of layers, layer objects, framework arrays and autograd rules."""
