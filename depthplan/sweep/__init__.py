"""The sweep wing: plan cells, store them (Optuna storage), schedule rates and depths, run workers."""
