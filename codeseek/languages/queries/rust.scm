; Rust units. impl blocks and inline modules are scopes: they qualify the
; names inside them. Closures are not captured: they stay inside their parent.
(function_item name: (identifier) @name) @function
(function_signature_item name: (identifier) @name) @function
(struct_item name: (type_identifier) @name) @class
(enum_item name: (type_identifier) @name) @class
(union_item name: (type_identifier) @name) @class
(trait_item name: (type_identifier) @name) @class
(impl_item) @scope
(mod_item name: (identifier) @name body: (declaration_list)) @scope
