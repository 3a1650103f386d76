// Runs the ahead-of-time compiled step program of a mnemode export from C++, without Python.
//
// An export made with `mnemode export RUN_DIR --compiled` (or export_simulator(..., compiled=True))
// holds simulator_compiled.pt2: PyTorch's AOTInductor package of the step program. This program
// loads it with libtorch's AOTIModelPackageLoader, advances a start state [x, r] (one trajectory)
// STEPS observation intervals and prints the final state, one component per line. It takes the
// autonomous step program (input: the state); timed and forced programs take t (and the forcing)
// first, as the manifest's programs.step.inputs lists.
//
// Build against the libtorch that ships with the torch wheel (see DEVELOPERS.md):
//   TORCH=$(python -c "import torch, os; print(os.path.dirname(torch.__file__))")
//   g++ -std=c++20 -O1 run_compiled_step.cpp -I$TORCH/include -I$TORCH/include/torch/csrc/api/include \
//       -L$TORCH/lib -ltorch -ltorch_cpu -lc10 -Wl,-rpath,$TORCH/lib -o run_compiled_step
// Run:
//   ./run_compiled_step RUN_DIR/export/memory/simulator_compiled.pt2 1000 x1 x2 x3 r1 ... rH
//
// The same cautions apply as to the Python loader: the package is native code (load only exports
// you made or trust), and the learned correction is valid only inside its training envelope, which
// this bare runner does not check (the manifest records it).
#include <torch/csrc/inductor/aoti_package/model_package_loader.h>
#include <ATen/ATen.h>

#include <iomanip>
#include <iostream>
#include <string>
#include <vector>

int main(int argc, char** argv) {
  if (argc < 4) {
    std::cerr << "usage: run_compiled_step PACKAGE.pt2 STEPS S1 [S2 ...]  (S: the start state [x, r])\n";
    return 2;
  }
  int steps = 0;
  std::vector<double> start;
  try {
    steps = std::stoi(argv[2]);
    for (int i = 3; i < argc; ++i) start.push_back(std::stod(argv[i]));
  } catch (const std::exception&) {
    std::cerr << "run_compiled_step: STEPS must be an integer and the state numbers\n";
    return 2;
  }
  torch::inductor::AOTIModelPackageLoader loader(argv[1]);
  at::Tensor s = at::tensor(start, at::kDouble).reshape({1, static_cast<int64_t>(start.size())});
  for (int k = 0; k < steps; ++k) s = loader.run({s})[0];
  s = s.contiguous();
  std::cout << std::setprecision(17);
  for (int64_t i = 0; i < s.numel(); ++i) std::cout << s.data_ptr<double>()[i] << "\n";
  return 0;
}
