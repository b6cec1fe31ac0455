; Rust units. impl blocks are scopes: they qualify their functions' names.
(function_item name: (identifier) @name) @function
(function_signature_item name: (identifier) @name) @function
(struct_item name: (type_identifier) @name) @class
(enum_item name: (type_identifier) @name) @class
(trait_item name: (type_identifier) @name) @class
(impl_item type: (_) @name) @scope
