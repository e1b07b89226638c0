//! All integration tests in one binary, so that a change in src/ relinks one test target.

mod adapter_batch;
mod adapter_cli;
mod adapter_examples;
mod adapter_faults;
mod adapter_map;
mod adapter_orphans;
mod adapter_protocol;
mod adapter_python;
mod check_gradient;
mod cli_core;
mod cli_hessian;
mod cli_sample;
mod cli_target_ess;
mod cli_verdict;
mod common;
mod config_compat;
mod core_burgers;
mod core_linear_gaussian;
mod core_lorenz96;
mod core_lorenz96_forcing;
mod diagnostics_arviz;
mod laplace;
mod output_files;
mod sampler_kernels;
mod sampler_resume;
mod summary_schema;
