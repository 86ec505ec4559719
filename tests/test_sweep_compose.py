"""Jobs composed from a copy (evenflag/runner/reusing_loader.py)
against Hydra's own loader, which composes each job from scratch: the reference
is Hydra (hydra-core's ConfigLoaderImpl.load_sweep_config), job by job."""

import pickle

import pytest
from hydra._internal.config_loader_impl import ConfigLoaderImpl
from hydra._internal.utils import create_config_search_path
from hydra.core.utils import setup_globals
from hydra.types import RunMode
from omegaconf import OmegaConf, open_dict

from evenflag.paths import config_dir
from evenflag.runner.config import register
from evenflag.runner.reusing_loader import ReusingConfigLoader

HYDRA_OVERRIDES = ["hydra/launcher=basic", "hydra.job.chdir=false"]


def loaders():
    register()
    setup_globals()  # Hydra's resolvers (${now:...}), as a launch registers them
    hydra_loader = ConfigLoaderImpl(config_search_path=create_config_search_path(str(config_dir())))
    return hydra_loader, ReusingConfigLoader(ConfigLoaderImpl(
        config_search_path=create_config_search_path(str(config_dir()))))


def master(loader, overrides):
    cfg = loader.load_configuration("config", HYDRA_OVERRIDES + overrides, RunMode.MULTIRUN)
    cfg.hydra.sweep.dir  # resolved once before the jobs, as Hydra's launchers do (${now:...} is cached)
    return cfg


def same_config(a, b):
    assert OmegaConf.to_container(a, resolve=False) == OmegaConf.to_container(b, resolve=False)
    assert OmegaConf.is_struct(a) == OmegaConf.is_struct(b)
    for cfg in (a, b):  # as a launcher numbers its jobs, before any job resolves its folders
        with open_dict(cfg):
            cfg.hydra.job.num = cfg.hydra.job.id = 0
    # Resolved: the job's output folder and the run config a job reads.
    assert OmegaConf.to_container(a.hydra.sweep, resolve=True) == OmegaConf.to_container(b.hydra.sweep, resolve=True)
    for key in (k for k in a if k != "hydra"):
        resolved = [OmegaConf.to_container(c[key], resolve=True) if OmegaConf.is_config(c[key]) else c[key]
                    for c in (a, b)]
        assert resolved[0] == resolved[1]


JOBS = [
    # A grid over plain values, with an appended (+) and a forced (++) key.
    ["dataset=synthetic_claims", "detector=sklearn", "detector.estimator=sklearn.mixture.GaussianMixture",
     "+detector.params.n_components=1", "++tags.owner=claims", "seed=0", "study=a"],
    ["dataset=synthetic_claims", "detector=sklearn", "detector.estimator=sklearn.mixture.GaussianMixture",
     "+detector.params.n_components=2", "++tags.owner=claims", "seed=1", "study=a"],
    # Another group choice with the same keys: composed anew, not copied from the first.
    ["dataset=german_credit", "detector=sklearn", "detector.estimator=sklearn.mixture.GaussianMixture",
     "+detector.params.n_components=1", "++tags.owner=audit", "seed=2", "study=a"],
    ["dataset=synthetic_claims", "detector=sklearn", "detector.estimator=sklearn.mixture.GaussianMixture",
     "+detector.params.n_components=3", "++tags.owner=claims", "seed=3", "study=a"],
]


def test_jobs_equal_hydras_composition_job_by_job():
    hydra_loader, reusing = loaders()
    parent = master(hydra_loader, ["seed=0,1,2,3"])
    for overrides in JOBS:
        same_config(reusing.load_sweep_config(parent, overrides), hydra_loader.load_sweep_config(parent, overrides))


def test_swept_detectors_with_their_own_settings_and_a_dict_value():
    """Detector options swept with a setting each has (forced in with ++, as
    `evenflag run` passes it), a dict-valued setting and a study experiment."""
    hydra_loader, reusing = loaders()
    parent = master(hydra_loader, ["detector=deep_svdd,autoencoder"])
    jobs = [[f"detector={name}", "++detector.epochs=2", f"seed={seed}", "dataset.source={rows: 300}"]
            for seed in (0, 1) for name in ("deep_svdd", "autoencoder")]
    jobs += [["experiment=demo", "seed=4"], ["experiment=demo", "seed=5"]]
    for overrides in jobs:
        ours = reusing.load_sweep_config(parent, overrides)
        same_config(ours, hydra_loader.load_sweep_config(parent, overrides))
    assert ours.seed == 5  # the last job's own value, not the copied composition's


def test_a_copy_is_independent_of_the_jobs_before_it():
    """A job that changes its config (Hydra's run_job sets output folders) does not reach the next job."""
    hydra_loader, reusing = loaders()
    parent = master(hydra_loader, ["seed=0,1"])
    first = reusing.load_sweep_config(parent, ["seed=0", "threads=1"])
    first.threads = 7
    second = reusing.load_sweep_config(parent, ["seed=1", "threads=1"])
    assert second.threads == 1 and second.seed == 1


def test_a_bad_plain_value_fails_as_in_hydra():
    hydra_loader, reusing = loaders()
    parent = master(hydra_loader, ["seed=0,1"])
    reusing.load_sweep_config(parent, ["seed=0"])
    with pytest.raises(Exception) as hydra_error:
        hydra_loader.load_sweep_config(parent, ["seed=abc"])
    with pytest.raises(type(hydra_error.value)):
        reusing.load_sweep_config(parent, ["seed=abc"])


def test_the_loader_travels_to_worker_processes():
    """The joblib launcher pickles the loader into each worker."""
    hydra_loader, reusing = loaders()
    parent = master(hydra_loader, ["seed=0,1"])
    copy = pickle.loads(pickle.dumps(reusing))
    assert copy.token == reusing.token
    same_config(copy.load_sweep_config(parent, ["seed=1"]), hydra_loader.load_sweep_config(parent, ["seed=1"]))
