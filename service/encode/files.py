"""Result files on disk: ``write_atomically`` lives in service.files, outside this package, so that the light
client (`wxshock submit`) can import it without this package's pandas and pyarrow; the name stays here too."""

from service.files import write_atomically

__all__ = ["write_atomically"]
