//! End-to-end tests: real `tessera` processes on loopback sockets, killed
//! and restarted, checked through the database they leave behind.
//!
//! One binary, a module per area; `harness` starts processes in a unique
//! temporary directory and cleans them up.

mod adaptive;
mod answers;
mod calibration;
mod deploy_files;
mod distributed;
mod external_model;
mod external_safety;
mod harness;
mod init_check_export;
mod local_run;
mod one_writer;
mod partition;
mod predict_check_fit;
mod report;
mod simulate;
mod slurm;
mod tidy;
mod tls_health;
mod trend_plot;
