; Python units: every function (async included) and class, at any depth.
(function_definition name: (identifier) @name) @function
(class_definition name: (identifier) @name) @class
