; Java units: type declarations, methods and constructors at any depth.
; Anonymous class bodies are @inline: what they declare stays in their parent.
(class_declaration name: (identifier) @name) @class
(interface_declaration name: (identifier) @name) @class
(enum_declaration name: (identifier) @name) @class
(record_declaration name: (identifier) @name) @class
(annotation_type_declaration name: (identifier) @name) @class
(method_declaration name: (identifier) @name) @function
(constructor_declaration name: (identifier) @name) @function
(compact_constructor_declaration name: (identifier) @name) @function
(object_creation_expression (class_body) @inline)
(enum_constant body: (class_body) @inline)
