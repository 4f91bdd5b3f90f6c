-- plumbline store, version 5: a snapshot's boards are stored as JSON
-- records of the service's own, no longer as the wire's protobuf messages,
-- so that the API can change without rewriting stored data. Boards an
-- earlier version stored are dropped here (the per-model values history
-- reads stay in snapshot_scores); at its first start the service finds a
-- dataset without boards and recomputes it.

DELETE FROM snapshot_boards WHERE hex(substr(board, 1, 1)) <> '7B';
