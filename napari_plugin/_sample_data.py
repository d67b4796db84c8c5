"""napari sample data: the synthetic micrographs bundled in ``tenfold.sample_images``."""

from __future__ import annotations

from importlib import resources

__all__ = ["sample_names", "load_sample", "high_dose", "low_dose", "vacancies", "hrtem_dark", "sheared"]


def sample_names() -> list[str]:
    """Names (file stems) of the bundled sample micrographs, sorted."""
    folder = resources.files("tenfold.sample_images")
    return sorted(p.name[:-4] for p in folder.iterdir() if p.name.endswith(".tif"))


def load_sample(name: str) -> list[tuple]:
    """Layer-data tuples of one bundled sample, read like any other file (calibrated, metadata attached)."""
    from tenfold.analysis._errors import TenfoldInputError

    from ._reader import read_layers

    resource = resources.files("tenfold.sample_images") / f"{name}.tif"
    if not resource.is_file():
        raise TenfoldInputError(
            f"sample {name!r}: not bundled; choose one of {', '.join(sample_names()) or '(none found)'}"
        )
    with resources.as_file(resource) as path:
        return read_layers(str(path))


def high_dose() -> list[tuple]:
    return load_sample("decagonal_haadf_high_dose")


def low_dose() -> list[tuple]:
    return load_sample("decagonal_haadf_low_dose")


def vacancies() -> list[tuple]:
    return load_sample("decagonal_haadf_vacancies")


def hrtem_dark() -> list[tuple]:
    return load_sample("decagonal_hrtem_dark")


def sheared() -> list[tuple]:
    return load_sample("decagonal_haadf_sheared")
