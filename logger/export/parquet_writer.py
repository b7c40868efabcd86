"""Apache Parquet through pyarrow (the ``export`` extra).

Numbers keep their numpy types (NaN stays NaN); a coded column becomes a dictionary-encoded
text column; each field carries its unit in the field metadata (``unit``), the file the run's
description in the schema metadata.
"""

from __future__ import annotations

from crankbeat.logger.export.base import TableWriter
from crankbeat.logger.export.table import ExportTable


class ParquetWriter(TableWriter):
    binary = True
    format_name = "Parquet"

    def _write(self, table: ExportTable) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq

        fields, arrays = [], []
        for name, values in table.columns.items():
            meta = {"unit": table.units.get(name, "")}
            if name in table.labels:
                arr = pa.array(table.text(name), pa.string()).dictionary_encode()
            else:
                arr = pa.array(values)
            fields.append(pa.field(name, arr.type, metadata=meta))
            arrays.append(arr)
        schema = pa.schema(fields, metadata={"table": table.name, **table.meta})
        pq.write_table(pa.Table.from_arrays(arrays, schema=schema), self.file)
