"""Archives the node reads from (``backfill``): Study Root query/retrieve over DIMSE
(C-FIND, C-GET, C-MOVE; :mod:`service.archive.dimse`) and DICOMweb (QIDO-RS, WADO-RS;
:mod:`service.archive.dicomweb`), behind one small interface (:mod:`service.archive.model`)."""
